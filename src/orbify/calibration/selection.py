"""Which original channels a calibrated conversion keeps, as whole orbits.

At the ``channels`` budget a layer of C channels becomes C/|G| orbits; calibration lets orbit o
stand for one kept original channel (slot 0 reproduces it, the other slots its moved copies).
Values joined by an elementwise op (a residual add, a squeeze-excitation product) must keep the
same channels, so the choice is made per channel class (:class:`orbify.transfer.ChannelClasses`)
from a score per original channel:

* ``importance``: the gain of the channel in every layer that writes it, the norm of its filter
  times the scale of the batch norm that follows (|γ|/√(var + ε)), summed over the writers,
  each normalised to mean 1;
* ``reconstruction``: the share of the next layers' outputs the channel carries, measured on the
  calibration images: for every layer that reads the class, Σ_o ‖W[o, c] ∗ x_c‖² — the squared
  error its output would suffer without channel c — from a per-channel Gram matrix of its
  input patches (one pass of the original); classes no layer reads fall back to ``importance``.

Grouped layers read whole blocks of channels: a class kept in blocks keeps the same number of
channels in every block when it can. Kept channels are returned in increasing order.
"""

from __future__ import annotations

from collections.abc import Iterable

import torch
import torch.nn.functional as F
from torch import fx, nn

from ..channels import dense_from_groups
from ..graph import shape
from ..transfer import ChannelClasses, chooses_channels

SELECTIONS = ("importance", "reconstruction")
LAYER_TYPES = (nn.Conv2d, nn.ConvTranspose2d, nn.Linear)


def out_first_weight(module: nn.Module) -> torch.Tensor:
    """A conv/linear weight with output channels first, groups made dense: (out, in, *kernel)."""
    weight = module.weight.detach()
    if isinstance(module, nn.ConvTranspose2d):
        weight = weight.transpose(0, 1)
    return dense_from_groups(weight, getattr(module, "groups", 1))


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


class ReconstructionScores:
    """Per-channel energy a layer's output draws from each input channel, accumulated over batches.

    ``energy[c] = Σ_o Σ_positions (W[o, c] · patch_c)²``, from per-channel Gram matrices of the
    input patches (conv: kernel window; linear on a flattened map: the channel's positions).
    """

    def __init__(self, module: nn.Module, channels: int):
        self.module = module
        self.channels = channels
        weight = out_first_weight(module).double()
        self.weight = weight.reshape(weight.shape[0], channels, -1)   # (out, channels, window)
        window = self.weight.shape[2]
        self.gram = torch.zeros(channels, window, window, dtype=torch.float64)

    def add(self, inputs: torch.Tensor) -> None:
        module = self.module
        if isinstance(module, nn.Conv2d):
            mode = "constant" if module.padding_mode == "zeros" else module.padding_mode
            padded = F.pad(inputs, module._reversed_padding_repeated_twice, mode=mode)
            patches = F.unfold(padded, module.kernel_size, dilation=module.dilation, stride=module.stride)
        else:
            patches = inputs.reshape(inputs.shape[0], -1, 1)
        patches = patches.reshape(inputs.shape[0], self.channels, self.weight.shape[2], -1)
        self.gram += torch.einsum("bcil,bcjl->cij", patches, patches).double()

    def energy(self) -> torch.Tensor:
        return torch.einsum("oci,ocj,cij->c", self.weight, self.weight, self.gram)


def reconstruction_energy(original: fx.GraphModule, readers: dict[int, list[fx.Node]],
                          batches: Iterable[torch.Tensor]) -> dict[int, torch.Tensor]:
    """Energy per original channel of every class, summed over the layers that read it (one pass of the original)."""
    scores: dict[str, ReconstructionScores] = {}
    hooks = []
    for nodes in readers.values():
        for node in nodes:
            module = original.get_submodule(node.target)
            if isinstance(module, (nn.Conv2d, nn.Linear)) and node.target not in scores:
                score = scores[node.target] = ReconstructionScores(module, shape(node.args[0])[1])
                hooks.append(module.register_forward_pre_hook(lambda _, args, score=score: score.add(args[0])))
    try:
        with torch.no_grad():
            for batch in batches:
                original(batch)
    finally:
        for hook in hooks:
            hook.remove()
    return {key: sum(scores[n.target].energy() for n in nodes if n.target in scores)
            for key, nodes in readers.items()}


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

    ``orbits_of(node)`` gives, for a channel-choosing layer node, the number of output orbits
    (None for plain outputs). ``keep(node)`` the kept original channels of its class.
    """

    def __init__(self, converted: fx.GraphModule, original: fx.GraphModule, layers: list[fx.Node],
                 orbits_of, method: str, batches: list[torch.Tensor]):
        self.classes = ChannelClasses(converted)
        self.kept: dict[int, torch.Tensor] = {}
        self.notes: dict[int, str] = {}
        writers: dict[int, list[fx.Node]] = {}
        count: dict[int, int] = {}
        for node in layers:
            if chooses_channels(converted.get_submodule(node.target)) and orbits_of(node) is not None:
                key = self.classes.key(node)
                writers.setdefault(key, []).append(node)
                count[key] = orbits_of(node)
        readers: dict[int, list[fx.Node]] = {key: [] for key in writers}
        for node in layers:
            key = self.classes.key(node.args[0])
            if key in readers:
                readers[key].append(node)
        energy = reconstruction_energy(original, readers, batches) if method == "reconstruction" else {}
        for key, nodes in writers.items():
            score = energy.get(key)
            if not isinstance(score, torch.Tensor) or not bool(score.sum() > 0):
                score = sum(importance(node, original) for node in nodes)
            blocks = self.classes.blocks(nodes[0]) or 1
            self.kept[key], note = top_channels(score, count[key], blocks)
            if note:
                self.notes[key] = note

    def keep(self, node: fx.Node) -> torch.Tensor:
        return self.kept[self.classes.key(node)]

    def note(self, node: fx.Node) -> str | None:
        return self.notes.get(self.classes.key(node))

