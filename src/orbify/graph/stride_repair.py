"""Repairing stride conflicts: an op replaced by its nearest counterpart exact on the other parity.

When two ops need input sides of opposite parity (:mod:`orbify.graph.stride_conflicts`), the one that
gives way in each conflict (``StrideConflict.giving_way``) is replaced, as an edit of the traced graph
before the conversion walk, by the op nearest to it that is exact on the other parity. A stride-2 op is
exact on the sides ``h ≡ k (mod 2)`` for kernel ``k`` (dilation 1; the padding does not change the parity),
so the counterpart has kernel ``k + 1``: its window contains the original's, its centre moved by half a
pixel. Its padding is ``p`` (``p + 1`` with ``ceil_mode``), which keeps the output side the original gives
on sides of the new parity, so the branches still meet. Per kind:

* **average pool** ``k×k`` → ``(k+1)×(k+1)`` average with ``count_include_pad=False`` (the mean of the
  pixels inside each window; a 2×2 one becomes 3×3 with padding 1); ``ceil_mode`` kept.
* **max pool** ``k×k`` → ``(k+1)×(k+1)`` max: the maximum over the windows of the two neighbouring
  original positions on each axis.
* **conv** ``k×k`` → ``(k+1)×(k+1)`` conv whose kernel is the original's blurred by a 2×2 box (the mean
  of its four one-pixel shifts): each output is the mean of the original's outputs at the four positions
  around the moved centre, the bilinear estimate of the original there. Bias, groups and padding mode kept.

Other ops — other strides, dilations, unequal axes, string paddings, subclasses, functional pools, a
module called at two nodes — have no counterpart, and the repair refuses naming them. The replacements
change what the model computes a little; :func:`repair_for_conversion` measures that drift on random
images and notes it, with every replacement, in the conversion plan (the tuning recovers it).
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
import torch.nn.functional as F
from torch import fx, nn

from orbify.common.modes import module_mode
from orbify.errors import InputShapeError
from orbify.graph.plan import ConversionPlan
from orbify.graph.sizes import SizeChecker
from orbify.graph.stride_conflicts import StrideConflict
from orbify.graph.tracing import describe, propagate_shapes, trace

REPAIR_NOTE = "stride repair"
"""How every plan note about a repair begins (the check report counts them)."""

DRIFT_IMAGES = 8
"""Random images (standard normal, ``torch.Generator().manual_seed(DRIFT_SEED)``, in the model's dtype) at
the conversion's input size, on which the repair's drift is measured."""
DRIFT_SEED = 0

_REPAIRABLE = (nn.Conv2d, nn.AvgPool2d, nn.MaxPool2d)


@dataclass(frozen=True)
class StrideRepair:
    """One replaced op: the node, what it was, what it became, and the conflict that asked for it."""

    node: str
    before: str
    after: str
    conflict: StrideConflict

    @property
    def note(self) -> str:
        others = [f"'{m.node}', which needs {m.needs}" for m in self.conflict.members if m.node != self.node]
        return (f"{REPAIR_NOTE}: '{self.node}' {self.before} → {self.after} (exact on the other parity), "
                f"so that it no longer conflicts with {'; '.join(others) or 'every input size'}")


def counterpart(module: nn.Module) -> nn.Module | None:
    """The op nearest ``module`` that is exact on input sides of the other parity (rules in the module
    docstring), in its dtype and device; None when there is none."""
    if type(module) not in _REPAIRABLE or isinstance(module.padding, str):
        return None
    pair = (lambda v: (v, v) if isinstance(v, int) else tuple(v))
    kernel, stride, padding = (pair(getattr(module, key)) for key in ("kernel_size", "stride", "padding"))
    if stride != (2, 2) or pair(getattr(module, "dilation", 1)) != (1, 1) or kernel[0] != kernel[1] \
            or padding[0] != padding[1]:
        return None
    k, p = kernel[0] + 1, padding[0] + (1 if getattr(module, "ceil_mode", False) else 0)
    if p > k // 2:
        return None
    if isinstance(module, nn.AvgPool2d):
        if module.divisor_override is not None:
            return None
        return nn.AvgPool2d(k, 2, p, ceil_mode=module.ceil_mode, count_include_pad=False)
    if isinstance(module, nn.MaxPool2d):
        return None if module.return_indices else nn.MaxPool2d(k, 2, p, ceil_mode=module.ceil_mode)
    return _blurred_conv(module, k, p)


def _blurred_conv(conv: nn.Conv2d, kernel: int, padding: int) -> nn.Conv2d:
    """``conv`` one pixel wider, its kernel the mean of the original's four one-pixel shifts."""
    weight = conv.weight.detach()
    new = nn.Conv2d(conv.in_channels, conv.out_channels, kernel, 2, padding, groups=conv.groups,
                    bias=conv.bias is not None, padding_mode=conv.padding_mode,
                    device=weight.device, dtype=weight.dtype)
    padded = F.pad(weight, (1, 1, 1, 1))
    with torch.no_grad():
        new.weight.copy_(sum(padded[..., i:i + kernel, j:j + kernel] for i in (0, 1) for j in (0, 1)) / 4)
        if conv.bias is not None:
            new.bias.copy_(conv.bias)
    return new


def _words(module: nn.Module) -> str:
    """``AvgPool2d 2×2, stride 2, padding 0`` and the options that matter."""
    k = module.kernel_size if isinstance(module.kernel_size, int) else module.kernel_size[0]
    p = module.padding if isinstance(module.padding, int) else module.padding[0]
    extra = ", count_include_pad=False" if isinstance(module, nn.AvgPool2d) and not module.count_include_pad else ""
    extra += ", ceil_mode" if getattr(module, "ceil_mode", False) else ""
    return f"{type(module).__name__} {k}×{k}, stride 2, padding {p}{extra}"


def repair_conflicts(gm: fx.GraphModule, channels: int, near: int) -> list[StrideRepair]:
    """Replace ops of ``gm`` until some input size is exact (:meth:`SizeChecker.conflicts`, probed from about
    ``near``); nothing when one already is. First the op that gives way in every conflict is replaced at once;
    when that leaves no exact size, conflict by conflict, the members are tried in the order
    ``StrideConflict.ranked`` gives, and a replacement is kept when it leaves fewer conflicts. Raises
    :class:`InputShapeError` naming a conflict that no counterpart resolves."""
    conflicts = SizeChecker(gm, channels).conflicts(near)
    if not conflicts:
        return []
    swaps = [swap for swap in (_swap(gm, c.giving_way, c, set()) for c in conflicts) if swap is not None]
    if swaps and _exact(SizeChecker(gm, channels), near, 1):      # no conflict left, and an exact size
        return [repair for repair, _ in swaps]
    for repair, original in reversed(swaps):
        gm.set_submodule(_target(gm, repair.node), original)
    repairs: list[StrideRepair] = []
    while conflicts:
        repair, conflicts = _resolve_first(gm, channels, near, conflicts, {r.node for r in repairs})
        repairs.append(repair)
    return repairs


def _exact(checker: SizeChecker, near: int, before: int, remaining: list[StrideConflict] | None = None) -> bool:
    """Whether the checked model has fewer than ``before`` conflicts (``remaining`` if known) and, when none
    is left, an exact size indeed (the conflict probe is silent where it cannot analyse)."""
    remaining = checker.conflicts(near) if remaining is None else remaining
    return len(remaining) < before and bool(remaining or checker.safe_sizes(near, 1))


def _target(gm: fx.GraphModule, name: str) -> str:
    return next(node.target for node in gm.graph.nodes if node.name == name)


def _swap(gm: fx.GraphModule, name: str, conflict: StrideConflict,
          replaced: set[str]) -> tuple[StrideRepair, nn.Module] | None:
    """Put the counterpart in place of the module node ``name`` calls (the repair and the module it replaced);
    None when it has none, is not a module called at one node, or was replaced already."""
    node = next(n for n in gm.graph.nodes if n.name == name)
    if node.op != "call_module" or name in replaced or not _called_once(gm, node):
        return None
    module = gm.get_submodule(node.target)
    new = counterpart(module)
    if new is None:
        return None
    gm.set_submodule(node.target, new)
    return StrideRepair(name, _words(module), _words(new), conflict), module


def _resolve_first(gm: fx.GraphModule, channels: int, near: int, conflicts: list[StrideConflict],
                   replaced: set[str]) -> tuple[StrideRepair, list[StrideConflict]]:
    """Resolve ``conflicts[0]`` with one replacement (not of a node in ``replaced``); the repair and what remains."""
    conflict = conflicts[0]
    tried = []
    for name in conflict.ranked:
        swap = _swap(gm, name, conflict, replaced)
        if swap is None:
            continue
        checker = SizeChecker(gm, channels)
        remaining = checker.conflicts(near)
        if _exact(checker, near, len(conflicts), remaining):
            return swap[0], remaining
        gm.set_submodule(_target(gm, name), swap[1])
        tried.append(f"'{name}' → {swap[0].after}")
    first = next(n for n in gm.graph.nodes if n.name == conflict.members[0].node)
    return _unresolved(first, conflict, tried)


def _called_once(gm: fx.GraphModule, node: fx.Node) -> bool:
    return sum(n.op == "call_module" and n.target == node.target for n in gm.graph.nodes) == 1


def _unresolved(node: fx.Node, conflict: StrideConflict, tried: list[str]):
    """Raise: no counterpart of a member of ``conflict`` resolves it (``tried``: those that did not)."""
    raise InputShapeError(
        f"--repair-strides cannot resolve the {conflict}" +
        (f"; replacing {' or '.join(tried)} left as many conflicts" if tried else "; no member has a counterpart"),
        where=describe(node),
        fix="a counterpart exists for a Conv2d, AvgPool2d or MaxPool2d module called at one node, with stride 2, "
            "dilation 1 and the same kernel and padding on both axes; otherwise convert at an inexact size with "
            "--input-size")


def repaired_model(model: nn.Module, channels: int, near: int) -> tuple[fx.GraphModule, list[StrideRepair]]:
    """A traced copy of ``model`` with its stride conflicts repaired (:func:`repair_conflicts`), e.g. to
    choose an input size that is exact for it; ``model`` is untouched."""
    gm = trace(model)
    return gm, repair_conflicts(gm, channels, near)


def repair_for_conversion(gm: fx.GraphModule, plan: ConversionPlan, example_input: torch.Tensor) -> None:
    """The conversion's repair step: repair ``gm`` (traced, shapes recorded) in place at the example input's
    side, record its shapes again, and note in ``plan`` every replacement and the drift they cause before
    tuning (:func:`repair_drift` on :data:`DRIFT_IMAGES` random images at the example input's size)."""
    channels, side = example_input.shape[1], example_input.shape[-1]
    dtype = next((p.dtype for p in gm.parameters() if p.is_floating_point()), torch.float32)
    images = torch.randn(DRIFT_IMAGES, *example_input.shape[1:], generator=torch.Generator().manual_seed(DRIFT_SEED),
                         dtype=dtype).to(example_input.device)
    before = _outputs(gm, images)
    repairs = repair_conflicts(gm, channels, side)
    if not repairs:
        plan.notes.append(f"{REPAIR_NOTE}: no ops conflict on the input side's parity; nothing replaced")
        return
    propagate_shapes(gm, example_input)
    plan.notes.extend(repair.note for repair in repairs)
    checker = SizeChecker(gm, channels)
    if not checker.is_safe(tuple(example_input.shape[-2:])):
        plan.notes.append(f"{REPAIR_NOTE}: the example input's side {side} is not exact for the repaired model; "
                          f"exact sides nearby: {checker.nearby(side)}")
    where = f"{DRIFT_IMAGES} random N(0, 1) images at {images.shape[-2]}×{images.shape[-1]}, seed {DRIFT_SEED}"
    if before is None:
        plan.notes.append(f"{REPAIR_NOTE} drift not measured: the original does not run at {where}")
        return
    relative, agreement = repair_drift(before, _outputs(gm, images))
    plan.notes.append(f"{REPAIR_NOTE} drift before tuning: relative output change {relative:.6g} and top-1 "
                      f"agreement {agreement:.4g} between the original and the original with the repairs, on "
                      f"{where}")


def _outputs(gm: fx.GraphModule, images: torch.Tensor) -> list[torch.Tensor] | None:
    """Every tensor ``gm`` outputs on ``images`` (eval mode), or None when it does not run on them."""
    found: list[torch.Tensor] = []
    try:
        with module_mode(gm, training=False), torch.no_grad():
            fx.node.map_aggregate(gm(images), lambda v: found.append(v) if isinstance(v, torch.Tensor) else None)
    except Exception:  # any failure means "the original does not run at this size"
        return None
    return found


def repair_drift(before: list[torch.Tensor], after: list[torch.Tensor]) -> tuple[float, float]:
    """(‖after − before‖ / ‖before‖ over every output tensor, the share of positions whose top-1 class along
    axis 1 of the first output agrees); top-1 agreement is 1 for an output without a class axis."""
    change = sum(float((a.double() - b.double()).pow(2).sum()) for a, b in zip(after, before))
    norm = sum(float(b.double().pow(2).sum()) for b in before)
    relative = (change / norm) ** 0.5 if norm else float(change > 0)
    first, moved = before[0], after[0]
    agreement = float((first.argmax(1) == moved.argmax(1)).double().mean()) if first.dim() >= 2 else 1.0
    return relative, agreement
