"""Safe input sizes: where every strided op samples a grid that the rotations map onto itself.

A strided conv or pool commutes with 90° rotations exactly when ``H + 2·padding − dilation·(k−1) − 1``
is divisible by the stride, in both spatial axes (docs/design.md §6); dilated convs without a
stride (the dilated backbones and atrous pyramids of segmentation models) keep every size exact.
A transposed conv is symmetric when it has no output padding. A resampling (``F.interpolate``,
``nn.Upsample``) is symmetric when its sampling grid is: bilinear or bicubic to a given ``size``
(either ``align_corners``) always is, nearest only when it enlarges by a whole factor, a ``scale_factor`` only
when the output side is exactly the input side times the factor. A TensorFlow-style "same" padding (timm's
``pad_same``, or a "same" conv or pool kept whole) is symmetric on the sides where it pads as much before as after
(:mod:`orbify.graph.padding`). Shapes are propagated on the ``meta`` device, so checking a size costs no
arithmetic but for resamplings, each of which is probed on one random channel of its input size
(:func:`resampling_break`). A model that branches on its input size is checked on the graph traced for the
branches each size takes (:class:`SizeChecker`). When no size is exact at all,
:meth:`SizeChecker.conflicts` names the ops that need sides no size gives them together
(:mod:`orbify.graph.stride_conflicts`).
"""

from __future__ import annotations

import copy
import functools
import operator
from dataclasses import dataclass
from typing import Callable, Union

import torch
import torch.nn.functional as F
from torch import fx, nn

from orbify.errors import InputShapeError, TraceError
from orbify.graph.padding import (
    PaddingViolation,
    is_even,
    is_same_padding,
    pads_same_itself,
    same_padding_geometry,
    same_pads,
)
from orbify.graph.shape_decisions import decides_by_size, shape_guard
from orbify.graph.stride_conflicts import SizeProbe, StrideConflict, find_conflicts, no_exact_size_error
from orbify.graph.tracing import describe, input_error, trace


@dataclass(frozen=True)
class StrideViolation:
    """One strided op whose sampling grid is not symmetric at the checked input size."""

    node: str
    where: str
    size: tuple[int, int]
    kernel: tuple[int, int]
    stride: tuple[int, int]
    padding: tuple[int, int]
    dilation: tuple[int, int] = (1, 1)
    output_padding: tuple[int, int] = (0, 0)      # a transposed conv's, which no input size makes exact

    def __str__(self) -> str:
        shape = (f"{self.where}: input {self.size[0]}×{self.size[1]}, kernel {self.kernel}, stride {self.stride}, "
                 f"padding {self.padding}")
        if any(self.output_padding):
            return f"{shape}, output padding {self.output_padding} — its output grid is not symmetric"
        if self.dilation == (1, 1):
            return f"{shape} — (H + 2·padding − kernel) is not divisible by the stride"
        return (f"{shape}, dilation {self.dilation} — (H + 2·padding − dilation·(kernel − 1) − 1) is not divisible "
                "by the stride")

    @property
    def needs(self) -> str:
        """The input sides this op is exact on, in words: ``h ≡ d·(k − 1) + 1 − 2p (mod s)`` per axis."""
        if any(self.output_padding):
            return "no output padding (a transposed conv with output padding is exact at no size)"
        sides = {(s, (d * (k - 1) + 1 - 2 * p) % s)
                 for k, s, p, d in zip(self.kernel, self.stride, self.padding, self.dilation) if s > 1}
        words = " and ".join("an odd" if (s, r) == (2, 1) else "an even" if (s, r) == (2, 0) else f"a ≡ {r} (mod {s})"
                             for s, r in sorted(sides))
        dilation = f", dilation {self.dilation[0]}" if self.dilation != (1, 1) else ""
        return (f"{words} input side (kernel {self.kernel[0]}×{self.kernel[1]}, stride {self.stride[0]}, "
                f"padding {self.padding[0]}{dilation})")


@dataclass(frozen=True)
class ResamplingViolation:
    """One resampling (interpolation) whose sampling grid is not symmetric at the checked input size."""

    node: str
    where: str
    size: tuple[int, int]
    output: tuple[int, int]
    broken: str                        # the grid move it does not commute with, in words

    def __str__(self) -> str:
        return (f"{self.where}: resampling {self.size[0]}×{self.size[1]} to {self.output[0]}×{self.output[1]} does "
                f"not commute with {self.broken} — its sampling grid is not symmetric (nearest is exact only when it "
                "enlarges by a whole factor, a scale_factor only where it gives whole sides; bilinear to a given size "
                "always is)")

    @property
    def needs(self) -> str:
        return f"a symmetric sampling grid (at {self.size[0]}×{self.size[1]} it breaks {self.broken})"


Violation = Union[StrideViolation, ResamplingViolation, PaddingViolation]
"""An op that breaks equivariance at a checked input size; ``node`` names it, ``str()`` says why."""


def _pair(v) -> tuple[int, int]:
    return (v, v) if isinstance(v, int) else tuple(v)


def _geometry(node: fx.Node, module: nn.Module | None) -> tuple | None:
    """(kernel, stride, padding, dilation) of a strided op node, or None when it is not one."""
    if isinstance(module, (nn.Conv2d, nn.MaxPool2d, nn.AvgPool2d)):
        dilation = getattr(module, "dilation", 1)
        return _pair(module.kernel_size), _pair(module.stride), _pair(module.padding), _pair(dilation)
    if node.op == "call_function" and node.target in (F.max_pool2d, F.avg_pool2d):
        args = list(node.args) + [None] * 5
        kernel = node.kwargs.get("kernel_size", args[1])
        stride = node.kwargs.get("stride", args[2]) or kernel
        padding = node.kwargs.get("padding", args[3] if args[3] is not None else 0)
        dilation = node.kwargs.get("dilation", args[4]) if node.target is F.max_pool2d else None
        return _pair(kernel), _pair(stride), _pair(padding), _pair(dilation or 1)
    return None


_CONV_ARGUMENTS = ("input", "weight", "bias", "stride", "padding", "dilation", "groups")


def _functional_conv_geometry(node: fx.Node, env: dict) -> tuple | None:
    """(kernel, stride, padding, dilation) of an ``F.conv2d`` call left in the graph (a blur pool's fixed filter,
    :mod:`orbify.graph.fixed_filters`), its kernel read off the filter's value in ``env``; None for other nodes."""
    if node.op != "call_function" or node.target is not F.conv2d:
        return None
    arguments = dict(zip(_CONV_ARGUMENTS, node.args))
    arguments.update(node.kwargs)
    weight, padding = env.get(arguments["weight"]), arguments.get("padding", 0)
    padding = 0 if padding == "valid" else padding
    if not isinstance(weight, torch.Tensor) or isinstance(padding, str):   # "same" pads unstrided convs only
        return None
    return (tuple(weight.shape[-2:]), _pair(arguments.get("stride", 1)), _pair(padding),
            _pair(arguments.get("dilation", 1)))


_MOVES = (("a mirror along the width", lambda t: t.flip(-1)), ("a mirror along the height", lambda t: t.flip(-2)),
          ("a transposition (the quarter turns)", lambda t: t.transpose(-2, -1)))


def resampling_break(resample: Callable[[torch.Tensor], torch.Tensor], size: tuple[int, int]) -> str | None:
    """The grid move (in words) that ``resample`` does not commute with at input ``size``; None when it commutes.

    ``resample`` maps a (1, 1, H, W) float64 map to its resampled map as the model's op does. It runs on a
    seeded random map and on that map mirrored along each axis and (square sizes) transposed: the two
    mirrors and the transposition generate every quarter turn and mirror, so an op commuting with them is
    exact under d4 and each of its subgroups.
    """
    probe = torch.randn(1, 1, *size, dtype=torch.float64, generator=torch.Generator().manual_seed(0))
    with torch.no_grad():
        reference = resample(probe)
        for words, move in _MOVES[:3 if size[0] == size[1] else 2]:
            moved, expected = resample(move(probe)), move(reference)
            if moved.shape != expected.shape or not torch.allclose(moved, expected, rtol=1e-9, atol=1e-12):
                return words
    return None


def _is_resampling(node: fx.Node, module: nn.Module | None) -> bool:
    return isinstance(module, nn.Upsample) or (node.op == "call_function" and node.target is F.interpolate)


def _resampler(module: nn.Module | None, args: tuple, kwargs: dict) -> Callable | None:
    """A resampling node's op as a function of its input map alone (``module``: an ``nn.Upsample``, else
    ``F.interpolate`` with ``args`` and ``kwargs``); None for an input that is not a batch of 2-d maps, or
    when an argument besides the input is a tensor (it lives on the meta device and cannot be probed).
    """
    leaves: list = []
    fx.node.map_aggregate((args[1:], kwargs), leaves.append)
    if not args or not isinstance(args[0], torch.Tensor) or args[0].dim() != 4 \
            or any(isinstance(leaf, torch.Tensor) for leaf in leaves):
        return None
    return module if module is not None else (lambda t: F.interpolate(t, *args[1:], **kwargs))


_SHAPE_KEEPING = (nn.modules.batchnorm._BatchNorm, nn.ReLU, nn.ReLU6, nn.SiLU, nn.GELU, nn.Hardswish,
                  nn.Hardsigmoid, nn.Sigmoid, nn.Dropout, nn.Identity)


class _FirstViolation(Exception):
    """Stops a check at the first violation when only safety is asked."""


class _Checker(fx.Interpreter):
    """Runs the graph on the meta device, collecting the ops that break; ``sides`` records each strided or
    resampling node's input height and stride, ``current`` the node being run (where a failure happened)."""

    def __init__(self, gm: fx.GraphModule, first_only: bool = False, resampling: bool = True):
        super().__init__(gm)
        self.violations: list[Violation] = []
        self.first_only = first_only
        self.resampling = resampling
        self.extra_traceback = not first_only
        self.sides: dict[str, tuple[int, int]] = {}
        self.current: fx.Node | None = None

    def run_node(self, node: fx.Node):
        self.current = node
        module = self.module.get_submodule(node.target) if node.op == "call_module" else None
        if isinstance(module, _SHAPE_KEEPING):
            return self.env[node.all_input_nodes[0]]   # shapes are all that matter here
        inputs = node.all_input_nodes
        x = self.env.get(inputs[0]) if inputs else None
        size = tuple(x.shape[-2:]) if isinstance(x, torch.Tensor) and x.dim() >= 3 else None
        geometry = _geometry(node, module) or _functional_conv_geometry(node, self.env)
        if size is not None and pads_same_itself(module):   # a "same" conv or pool kept whole: pad, then sample
            kernel, stride, dilation = (_pair(getattr(module, key, 1)) for key in ("kernel_size", "stride", "dilation"))
            self._check_padding(node, size, kernel, stride, dilation)
            padded = tuple(side + sum(same_pads(side, *axis)) for side, axis in zip(size, zip(kernel, stride, dilation)))
            self._check(node, padded, kernel, stride, (0, 0), dilation)
        elif geometry is not None and size is not None:
            self._check(node, size, *geometry)
        if is_same_padding(node) and size is not None:
            self._check_padding(node, size, *same_padding_geometry(*self.fetch_args_kwargs_from_env(node)))
        if isinstance(module, nn.ConvTranspose2d) and any(_pair(module.output_padding)):
            self._add(StrideViolation(node.name, describe(node), size, _pair(module.kernel_size),
                                      _pair(module.stride), _pair(module.padding),
                                      output_padding=_pair(module.output_padding)))
        output = super().run_node(node)
        if _is_resampling(node, module) and size is not None:
            self.sides[node.name] = (size[0], 2)
            if self.resampling:
                self._check_resampling(node, module, output)
        return output

    def _check(self, node, size, kernel, stride, padding, dilation) -> None:
        if all(s == 1 for s in stride):
            return
        self.sides[node.name] = (size[0], stride[0])
        for h, k, s, p, d in zip(size, kernel, stride, padding, dilation):
            if (h + 2 * p - d * (k - 1) - 1) % s:
                self._add(StrideViolation(node.name, describe(node), size, kernel, stride, padding, dilation))
                return

    def _check_padding(self, node: fx.Node, size: tuple[int, int], kernel: tuple[int, int],
                       stride: tuple[int, int], dilation: tuple[int, int]) -> None:
        """A "same" padding is exact where it pads as much before as after (:mod:`orbify.graph.padding`)."""
        self.sides[node.name] = (size[0], stride[0])
        if not is_even(size, kernel, stride, dilation):
            self._add(PaddingViolation(node.name, describe(node), size, kernel, stride, dilation))

    def _check_resampling(self, node: fx.Node, module: nn.Module | None, output) -> None:
        args, kwargs = self.fetch_args_kwargs_from_env(node)
        resample = _resampler(module, args, kwargs)
        if resample is None:
            return
        size = tuple(args[0].shape[-2:])
        broken = resampling_break(resample, size)
        if broken is not None:
            self._add(ResamplingViolation(node.name, describe(node), size, tuple(output.shape[-2:]), broken))

    def _add(self, violation: Violation) -> None:
        self.violations.append(violation)
        if self.first_only:
            raise _FirstViolation


#: The side a model that decides by its input size is first traced at when no size is given: the side most image
#: classifiers are trained at. Sizes taking other branches are traced when checked.
DECIDING_SIDE = 224


def _branches_otherwise(checker: _Checker, error: Exception | None) -> bool:
    """True when a run stopped at a guard of a branch on sizes (the input takes another branch than the graph)."""
    node = checker.current
    return error is not None and node is not None and node.op == "call_function" and node.target is shape_guard


class SizeChecker:
    """Checks input sizes of one model; trace once, check many sizes (inputs in the dtype of its parameters).

    A plain model that decides by its input size while tracing (:mod:`orbify.graph.shape_decisions`) is traced at
    ``near`` (else :data:`DECIDING_SIDE`), and traced again at each checked size whose branches no graph traced so
    far takes; a traced graph (a converted model) runs only at sizes that take its own branches.
    """

    def __init__(self, model: nn.Module, channels: int = 3, near: int | None = None):
        self.channels = channels
        self._deciding: nn.Module | None = None   # the plain model, when it decides by its input size
        gm = model if isinstance(model, fx.GraphModule) else self._trace(model, near or DECIDING_SIDE)
        self.gm = copy.deepcopy(gm).to("meta").eval()
        self._graphs = [self.gm]
        floats = (p.dtype for p in self.gm.parameters() if p.is_floating_point())
        self.dtype = next(floats, torch.float32)
        self._conflicts: dict[int, list[StrideConflict]] = {}

    def _trace(self, model: nn.Module, side: int) -> fx.GraphModule:
        try:
            return trace(model)
        except TraceError as error:
            if not decides_by_size(error):
                raise
        self._deciding = model
        return self._trace_at(model, (1, self.channels, side, side))

    def _trace_at(self, model: nn.Module, shape: tuple[int, ...]) -> fx.GraphModule:
        """``model`` traced with the branches taken at an input of ``shape``."""
        tensor = next((p for p in model.parameters() if p.is_floating_point()), torch.empty(0))
        return trace(model, torch.zeros(shape, dtype=tensor.dtype, device=tensor.device))

    def _run(self, shape: tuple[int, ...], first_only: bool = False,
             resampling: bool = True) -> tuple[_Checker, Exception | None]:
        """Run an input of ``shape`` on the meta device through the first graph whose branches it takes (a model
        deciding by its size is traced again for it when none does): the checker and the failure, if any."""
        for gm in self._graphs:
            checker, error = self._attempt(gm, shape, first_only, resampling)
            if not _branches_otherwise(checker, error):
                return checker, error
        if self._deciding is None:
            return checker, error
        self._graphs.append(copy.deepcopy(self._trace_at(self._deciding, shape)).to("meta").eval())
        return self._attempt(self._graphs[-1], shape, first_only, resampling)

    def _attempt(self, gm: fx.GraphModule, shape: tuple[int, ...], first_only: bool,
                 resampling: bool) -> tuple[_Checker, Exception | None]:
        checker = _Checker(gm, first_only, resampling)
        try:
            with torch.no_grad():
                checker.run(torch.empty(shape, device="meta", dtype=self.dtype))
        except _FirstViolation:
            pass
        except Exception as error:  # any failure means "does not run at this size"; the caller says where
            return checker, error
        return checker, None

    def violations(self, size: int | tuple[int, int], first_only: bool = False) -> list[Violation]:
        """Strided ops, "same" paddings and resamplings that break equivariance at this input size (empty when the
        size is safe)."""
        h, w = _pair(size)
        shape = (1, self.channels, h, w)
        checker, error = self._run(shape, first_only)
        if error is not None:
            fixed = fixed_size_error(checker.current, (h, w)) if checker.current is not None else None
            raise (fixed or input_error(checker.module, shape, error)) from error
        return checker.violations

    def probe(self, size: int, resampling: bool = True) -> SizeProbe:
        """What the square input side ``size`` does: the ops that break, where the model stops running (if it
        does) and the input side of each strided or resampling op (``resampling=False``: sides only)."""
        checker, error = self._run((1, self.channels, size, size), resampling=resampling)
        failed = None
        if error is not None:
            lines = str(error).strip().splitlines()
            failed = (checker.current.name if checker.current is not None else "input",
                      lines[0] if lines else type(error).__name__)
        return SizeProbe({v.node: v for v in checker.violations}, failed, checker.sides)

    def conflicts(self, near: int) -> list[StrideConflict]:
        """Why no input size is exact, when none is: the ops that need sides no size gives them together
        (:func:`orbify.graph.stride_conflicts.find_conflicts`, probing one period of sides from about ``near``).
        Empty when some size is exact."""
        if near not in self._conflicts:
            self._conflicts[near] = find_conflicts(self.gm, self.probe, near)
        return self._conflicts[near]

    def nearby(self, size: int, count: int = 3) -> str:
        """The safe sizes nearest ``size`` as text; where there is none, why (the conflicts), or "none found"."""
        found = self.safe_sizes(size, count)
        if found:
            return ", ".join(map(str, found))
        conflicts = self.conflicts(size)
        if conflicts:
            return str(no_exact_size_error(conflicts)).removesuffix(".")
        return "none found"

    def is_safe(self, size: int | tuple[int, int]) -> bool:
        try:
            return not self.violations(size, first_only=True)
        except InputShapeError:
            return False   # the model does not run at this size at all

    def safe_sizes(self, near: int, count: int = 5, span: int = 128) -> list[int]:
        """Up to ``count`` safe square sizes nearest to ``near`` (ties: the smaller first)."""
        found: list[int] = []
        for size in sorted(range(max(near // 2, 8, near - span), near + span + 1), key=lambda s: (abs(s - near), s)):
            if self.is_safe(size):
                found.append(size)
                if len(found) == count:
                    break
        return found


_FIXED_SIZE_FIX = ("convert at the size the model was built for; for another size build the model for it (torchvision's "
                   "ViTs take image_size=S, S a multiple of the patch size) or use one that interpolates its position "
                   "embeddings")


_COMBINING = {operator.add, torch.add, torch.cat, torch.concat, "add", "add_"}
"""Ops that combine a model tensor with the values: where fixed position embeddings meet tokens of another count."""


def fixed_size_error(node: fx.Node, size: tuple[int, int]) -> InputShapeError | None:
    """Why an input of ``size`` stops at ``node`` when the model is fixed to one input size, or None.

    Two ways a model (a vision transformer) is fixed to one size: it asserts its input size itself
    (``torch._assert``, as torchvision's ViT does), or it adds or concatenates a model tensor with a token count
    of its own (learned position embeddings) to a sequence whose token count follows the input size.
    """
    side = f"{size[0]}×{size[1]}"
    if node.op == "call_function" and node.target is torch._assert:
        return InputShapeError(f"The model checks its input size itself and refuses {side}: it runs at one input size "
                               "only (a vision transformer whose position embeddings are fixed to one patch grid), so "
                               "no other size is offered", where=describe(node), fix=_FIXED_SIZE_FIX)
    tensors = [_model_tensor(arg) for arg in node.all_input_nodes]
    held = [tensor for tensor in tensors if tensor is not None]
    if node.target in _COMBINING and held and len(tensors) > 1:
        value = functools.reduce(getattr, held[0].target.split("."), node.graph.owning_module)
        return InputShapeError(f"At {side} the model meets its tensor '{held[0].target}' (shape {tuple(value.shape)}) "
                               "with values whose shape follows the input size: it runs at one input size only "
                               "(position embeddings fixed to one patch grid), so no other size is offered",
                               where=describe(node), fix=_FIXED_SIZE_FIX)
    return None


def _model_tensor(node: fx.Node) -> fx.Node | None:
    """The ``get_attr`` node behind ``node`` through expand/contiguous/casts, or None."""
    while node.op == "call_method" and node.target in ("expand", "contiguous", "to", "float") and node.args:
        node = node.args[0]
    return node if node.op == "get_attr" else None


def safe_sizes(model: nn.Module, near: int, count: int = 5, channels: int = 3) -> list[int]:
    """Square input sizes near ``near`` at which every strided and resampling op of ``model`` is exact.

    Up to ``count`` sizes, nearest first (ties: the smaller first); ``channels`` is the model's input channels.
    Raises :class:`~orbify.errors.InputShapeError` when no input size is exact at all, naming the ops that
    conflict and what each needs (:meth:`SizeChecker.conflicts`).

    >>> from torch import nn
    >>> import orbify
    >>> model = nn.Sequential(nn.Conv2d(3, 8, 3, stride=2, padding=1), nn.ReLU(), nn.Conv2d(8, 8, 3, stride=2))
    >>> orbify.safe_sizes(model, near=32, count=3)
    [33, 29, 37]
    """
    checker = SizeChecker(model, channels, near)
    found = checker.safe_sizes(near, count)
    if not found and checker.conflicts(near):
        raise no_exact_size_error(checker.conflicts(near))
    return found


def input_channels(model: nn.Module) -> int:
    """Input channels of ``model``: those of its first conv layer, else 3 (RGB)."""
    for module in model.modules():
        if isinstance(module, nn.Conv2d):
            return module.in_channels
    return 3


@dataclass(frozen=True)
class SizeChoice:
    """The input side a conversion uses and, in words, why."""

    size: int
    reason: str
    conflicts: tuple[StrideConflict, ...] = ()   # why no input size is exact, when none is


def choose_input_size(model: nn.Module, usual: tuple[int, str], *, requested: int | None = None,
                      recipe_size: int | None = None, recipe_name: str | None = None,
                      channels: int = 3) -> SizeChoice:
    """Pick the input side for converting ``model`` and say why.

    In order: the ``requested`` size (kept even when unsafe — the reason then names the first
    strided or resampling op that breaks and the nearest safe sizes), the recipe's size, else the safe
    size nearest ``usual``, the side the architecture is usually run at with what that guess rests on
    (:func:`orbify.files.sources.usual_input_size`). A size is *safe* when every strided and resampling
    op samples a grid that quarter turns map onto themselves (:class:`SizeChecker`). When no size is
    exact at all, ``usual`` is kept and the choice carries the conflicts that say why.
    """
    checker = SizeChecker(model, channels, requested or recipe_size or usual[0])
    if requested is not None:
        return SizeChoice(requested, "given with --input-size" + _safety(checker, requested))
    if recipe_size is not None:
        return SizeChoice(recipe_size, f"the size of recipe {recipe_name!r}" + _safety(checker, recipe_size))
    usual_size, why = usual
    nearest = checker.safe_sizes(usual_size, 1)
    conflicts = tuple(checker.conflicts(usual_size)) if not nearest else ()
    if conflicts:
        return SizeChoice(usual_size, f"{why}; {no_exact_size_error(conflicts).what}", conflicts)
    if not nearest:
        return SizeChoice(usual_size, f"{why}; no safe size lies near it" + _safety(checker, usual_size))
    if nearest[0] == usual_size:
        return SizeChoice(usual_size, f"{why}, and safe")
    return SizeChoice(nearest[0], f"the safe size nearest {usual_size} ({why}); {usual_size} itself is not safe: "
                                  f"{_first_break(checker, usual_size)}")


def _first_break(checker: SizeChecker, size: int) -> str:
    """The first op that breaks at an unsafe ``size``, or that the model does not run at it."""
    try:
        broken = checker.violations(size)
    except InputShapeError as error:
        return f"the model does not run at it ({error.what})"
    return str(broken[0]) if broken else "no op breaks"


def _safety(checker: SizeChecker, size: int) -> str:
    """', safe' for a safe size, else a warning naming the first broken op and the nearest safe sizes."""
    if checker.is_safe(size):
        return ", safe"
    return (f", NOT safe: {_first_break(checker, size)}. The converted model is not exactly equivariant at this size; "
            f"safe sizes nearby: {checker.nearby(size)}")
