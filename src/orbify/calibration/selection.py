"""Which original channels a calibrated conversion keeps, as whole orbits (docs/design.md §9.3).

At the ``channels`` budget a layer of C channels becomes C/|G| orbits; calibration lets orbit o
stand for one kept original channel (slot 0 reproduces it, the other slots its moved copies).
Values joined by an elementwise op (a residual add, a squeeze-excitation product) must keep the
same channels, so the choice is made per channel class (:class:`orbify.transfer.matching.ChannelClasses`)
from a score per original channel:

* ``importance``: the gain of the channel in every layer that writes it, the norm of its filter
  times the scale of the batch norm that follows (|γ|/√(var + ε)), summed over the writers,
  each normalised to mean 1;
* ``reconstruction``: the channels whose orbits best explain what the next layers read, on the
  calibration images and their copies, chosen greedily (:mod:`orbify.calibration.span`); classes
  no layer reads fall back to ``importance``.

Grouped layers read whole blocks of channels: a class kept in blocks keeps the same number of
channels in every block when it can. Kept channels are returned in increasing order.
"""

from __future__ import annotations

from collections.abc import Mapping

import torch
from torch import fx, nn

from orbify.calibration.positions import moved_back, positions_as_samples
from orbify.calibration.span import OrbitCovariance, SpanRequest, greedy_orbits
from orbify.graph.tracing import shape
from orbify.symmetry.groups import Group
from orbify.symmetry.layouts import Flat, Layout, Permuted
from orbify.transfer.kinds import chooses_channels
from orbify.transfer.loading import out_first_weight
from orbify.transfer.matching import ChannelClasses

SELECTIONS = ("importance", "reconstruction")


def out_channels(module: nn.Module) -> int:
    """The output channels of a conv or linear layer."""
    return module.out_features if isinstance(module, nn.Linear) else module.out_channels


def following_norm(node: fx.Node, gm: fx.GraphModule) -> nn.Module | None:
    """The batch norm that is the only reader of ``node``'s output, if there is one."""
    users = list(node.users)
    if len(users) == 1 and users[0].op == "call_module":
        module = gm.get_submodule(users[0].target)
        if isinstance(module, nn.modules.batchnorm._BatchNorm):
            return module
    return None


def importance(node: fx.Node, original: fx.GraphModule) -> torch.Tensor:
    """Gain per output channel of one layer: filter norm × scale of the following batch norm."""
    module = original.get_submodule(node.target)
    weight = out_first_weight(module)
    gain = weight.reshape(weight.shape[0], -1).norm(dim=1).double()
    norm = following_norm(node, original)
    if norm is not None and norm.affine and norm.track_running_stats:
        gain = gain * (norm.weight.detach().abs() / (norm.running_var + norm.eps).sqrt()).double()
    return gain / gain.mean().clamp_min(1e-30)


#: Images whose copies the kept-channel choice reads (the first ones): the covariances it needs settle on fewer
#: images than the refit, and this pass costs |G| forward passes of the original per image.
SELECTION_IMAGES = 128


def _first_images(batches: list[torch.Tensor], count: int) -> list[torch.Tensor]:
    """The leading batches holding the first ``count`` images (the last one cut to size)."""
    kept, seen = [], 0
    for batch in batches:
        if seen >= count:
            break
        kept.append(batch[:count - seen])
        seen += kept[-1].shape[0]
    return kept


def span_statistics(original: fx.GraphModule, requests: dict[int, SpanRequest], batches: list[torch.Tensor],
                    group: Group, slots: list[int]) -> dict[int, tuple[torch.Tensor, torch.Tensor]]:
    """The covariance of every requested class's orbit features over the calibration images (block row, slot table).

    The original runs on every copy s⁻¹·x of each batch; the inputs of the classes' readers are
    moved back by s (their positions, pixels or tokens, become samples) and stacked as the slots of the features.
    """
    covariances = {key: OrbitCovariance(request.channels, group, slots) for key, request in requests.items()}
    captured: dict[int, list[torch.Tensor]] = {key: [] for key in requests}
    running = {"slot": 0}

    def capture(key: int, value: torch.Tensor) -> None:
        request = requests[key]
        value = moved_back(group, value, running["slot"], request.layout)
        captured[key].append(positions_as_samples(value, request.channels, request.layout).detach())

    hooks = [original.get_submodule(request.reader).register_forward_pre_hook(
        lambda _, args, key=key: capture(key, args[0])) for key, request in requests.items()]
    try:
        for b, batch in enumerate(batches):
            for slot in slots:
                running["slot"] = slot
                original(batch if slot == 0 else group.act_grid(group.inverse(slot), batch))
            for key, values in captured.items():
                covariances[key].add(torch.stack(values, 2), seed=b)
                values.clear()
    finally:
        for hook in hooks:
            hook.remove()
    return {key: covariances[key].covariance(request.slot_means) for key, request in requests.items()}


def top_channels(score: torch.Tensor, count: int, blocks: int) -> tuple[torch.Tensor, str | None]:
    """The ``count`` best channels (increasing order), the same number from each of ``blocks`` blocks when possible."""
    channels = score.numel()
    if count >= channels:
        return torch.arange(count) % channels, (f"{count} orbits for {channels} channels: channels repeat"
                                                if count > channels else None)
    if blocks > 1 and count % blocks == 0 and channels % blocks == 0:
        per, size = count // blocks, channels // blocks
        picks = [score[b * size:(b + 1) * size].topk(per).indices + b * size for b in range(blocks)]
        return torch.cat(picks).sort().values, None
    note = f"kept channels ignore the {blocks} channel groups" if blocks > 1 else None
    return score.topk(count).indices.sort().values, note


class ChannelChoice:
    """The kept channels of every channel class with orbit outputs in a converted model.

    ``orbits_of(node)`` gives the number of output orbits of a layer node (None for plain outputs);
    ``keep(node)`` the kept original channels of the class a node belongs to. ``slots`` are the
    group elements whose copies of the images the ``reconstruction`` choice sees ([0]: the images only);
    ``layouts`` the layout of every value by node name (the plan's ``values``).
    """

    def __init__(self, converted: fx.GraphModule, original: fx.GraphModule, layers: list[fx.Node], orbits_of,
                 method: str, batches: list[torch.Tensor], group: Group, slots: list[int],
                 layouts: Mapping[str, Layout | None]):
        self.classes = ChannelClasses(converted)
        self.joined = _joined_by_concatenation(converted, self.classes, layouts)
        self.kept: dict[int, torch.Tensor] = {}
        self.notes: dict[int, str] = {}
        writers: dict[int, list[fx.Node]] = {}
        count: dict[int, int] = {}
        for node in layers:
            if chooses_channels(converted.get_submodule(node.target)) and orbits_of(node) is not None:
                key = self.key(node)
                writers.setdefault(key, []).append(node)
                count[key] = orbits_of(node)
        readers: dict[int, list[fx.Node]] = {key: [] for key in writers}
        for node in layers:
            key = self.key(node.args[0])
            if key in readers:
                readers[key].append(node)
        requests = {}
        if method == "reconstruction":
            for key, nodes in readers.items():
                # a depthwise layer reads each channel alone; the layers that mix channels judge the choice
                mixing = [n for n in nodes if chooses_channels(original.get_submodule(n.target))]
                if mixing:
                    channels = out_channels(original.get_submodule(writers[key][0].target))
                    weights = sum(_reading(original.get_submodule(n.target), channels) for n in mixing)
                    requests[key] = SpanRequest(str(mixing[0].target), channels, weights, orbits_of(mixing[0]) is None,
                                                layouts.get(mixing[0].args[0].name))
        covariances = span_statistics(original, requests, _first_images(batches, SELECTION_IMAGES), group,
                                      slots) if requests else {}
        for key, nodes in writers.items():
            blocks = self.classes.blocks(nodes[0]) or 1
            if key in covariances:
                self.kept[key] = greedy_orbits(*covariances[key], requests[key].weights, count[key], blocks)
                continue
            score = sum(importance(node, original) for node in nodes)
            self.kept[key], note = top_channels(score, count[key], blocks)
            if note:
                self.notes[key] = note

    def key(self, node: fx.Node) -> int:
        """The channel class of ``node``'s value (classes joined by a concatenation along positions are one)."""
        key = self.classes.key(node)
        return self.joined.get(key, key)

    def keep(self, node: fx.Node) -> torch.Tensor:
        return self.kept[self.key(node)]


def _joined_by_concatenation(gm: fx.GraphModule, classes: ChannelClasses,
                             layouts: Mapping[str, Layout | None]) -> dict[int, int]:
    """Channel classes that a concatenation along positions joins (a class token put before the patch tokens).

    Such a ``torch.cat`` (along an axis that does not hold the channels) carries its parts' channels,
    so the parts computed from the input and the result must keep the same channels; the tensors of the
    model among the parts (a class token) take the kept channels' entries. Returns the class each joined
    class is one with.
    """
    parent: dict[int, int] = {}

    def root(key: int) -> int:
        while parent.get(key, key) != key:
            key = parent[key]
        return key

    for node in gm.graph.nodes:
        layout = layouts.get(node.name)
        if node.op != "call_function" or node.target is not torch.cat or layout is None or isinstance(layout, Flat):
            continue
        rank = len(layout.dims) if isinstance(layout, Permuted) else len(shape(node) or ())
        dim = node.kwargs.get("dim", node.args[1] if len(node.args) > 1 else 0)
        if rank and dim % rank != (layout.channel_axis if isinstance(layout, Permuted) else 1):
            for part in node.args[0]:
                if isinstance(part, fx.Node) and layouts.get(part.name) is not None and \
                        root(classes.key(part)) != root(classes.key(node)):
                    parent[root(classes.key(part))] = root(classes.key(node))
    return {key: root(key) for key in parent}


def _reading(module: nn.Module, channels: int) -> torch.Tensor:
    """How strongly a layer reads each of its ``channels`` input channels: Σ_o ‖W[o, c]‖²."""
    weight = out_first_weight(module).double()
    return weight.reshape(weight.shape[0], channels, -1).square().sum((0, 2))
