"""Equivariance of approximate groups (c8, c16, d8, ...), measured where it means something (docs/design.md §11.4).

A group whose rotations are not multiples of 90° moves filters by resampling and images by
interpolation, so a tied model is equivariant to it only *approximately*: exactly to the quarter
turns and the mirror it contains, approximately to the other elements. Rotated images lose their
corners, so the measurement here

* multiplies the inputs by a smooth disk window (:func:`disk_window`), so that both the image and
  its rotation are zero outside the disk and the rotation loses nothing;
* turns the inputs exactly when they are a :class:`SmoothPattern` (sampled turned), otherwise by
  :func:`orbify.symmetry.layouts.act`, i.e. bilinear interpolation off the 90° grid; feature maps (slots
  permuted) always by :func:`~orbify.symmetry.layouts.act`;
* compares every spatial value on the central disk of its own resolution
  (:func:`orbify.symmetry.resample.central_disk_mask`), non-spatial values (logits) whole.

Interpolation blurs, so white-noise inputs rotated by 45° are not the same images any more. Use
smooth inputs, best a :class:`SmoothPattern`, which is sampled at every angle instead of
interpolated: then the input rotation adds no error at all, and the output error (invariance of
logits, say) is the model's own. Turning the inputs by interpolation can account for most of the
measured error; see benchmarks/README.md, "Finer rotations".
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass

import torch
from torch import nn

from orbify.common.options import check_choice
from orbify.errors import InputShapeError
from orbify.symmetry.groups import Group
from orbify.symmetry.layouts import Flat, Layout, Plain, act
from orbify.symmetry.resample import central_disk_mask

SCALES = ("value", "spread")


def disk_window(height: int, width: int, taper: float | None = None) -> torch.Tensor:
    """Float (height, width) window: 1 inside the central disk, falling to 0 at its edge by a raised cosine.

    The disk is that of :func:`~orbify.symmetry.resample.central_disk_mask` (radius (min(h, w) - 1)/2 - 1);
    the fall-off spans its outer ``taper`` pixels (default a quarter of the radius, at least 2).
    """
    if height < 1 or width < 1:
        raise InputShapeError(f"image size must be at least 1×1, got {height}×{width}",
                              where="orbify.verification.approximate.disk_window")
    radius = (min(height, width) - 1) / 2 - 1
    taper = max(2.0, radius / 4) if taper is None else float(taper)
    rows = torch.arange(height, dtype=torch.float64).unsqueeze(1) - (height - 1) / 2
    cols = torch.arange(width, dtype=torch.float64).unsqueeze(0) - (width - 1) / 2
    distance = torch.hypot(rows, cols)
    ramp = ((radius - distance) / taper).clamp(0, 1)
    return 0.5 - 0.5 * torch.cos(math.pi * ramp)


class SmoothPattern:
    """Random smooth images defined on the whole plane, so that every rotation is sampled, not interpolated.

    Each image channel is a sum of ``waves`` plane waves ``a cos(ω·p + φ)`` with ``a`` standard
    normal, ``φ`` uniform and ``ω`` normal with standard deviation 2π/``wavelength`` radians per
    pixel (a smooth Gaussian random field, unit variance, whose power halves at about a quarter of
    the Nyquist frequency for the default wavelength of 8 pixels). :meth:`sample` evaluates it at
    the pixel centres (the planar coordinates of :mod:`orbify.symmetry.resample`) of the pattern turned by
    any angle, times the radial :func:`disk_window`; turned samples are therefore exact rotations
    of each other on the whole grid, and the measured error is the model's alone.
    """

    def __init__(self, count: int, channels: int, size: int | tuple[int, int], *, wavelength: float = 8.0,
                 waves: int = 64, seed: int = 0):
        self.height, self.width = (size, size) if isinstance(size, int) else size
        generator = torch.Generator().manual_seed(seed)
        shape = (count, channels, waves)
        self.frequencies = torch.randn(*shape, 2, generator=generator, dtype=torch.float64) * (2 * math.pi / wavelength)
        self.phases = torch.rand(*shape, generator=generator, dtype=torch.float64) * (2 * math.pi)
        self.amplitudes = torch.randn(*shape, generator=generator, dtype=torch.float64) / math.sqrt(waves / 2)

    def sample(self, angle: float = 0.0, mirror: bool = False, dtype: torch.dtype = torch.float32) -> torch.Tensor:
        """(count, channels, H, W): the pattern mirrored left-right if ``mirror``, then turned
        counter-clockwise by ``angle`` radians, sampled at the pixel centres and windowed."""
        rows = torch.arange(self.height, dtype=torch.float64).unsqueeze(1)
        cols = torch.arange(self.width, dtype=torch.float64).unsqueeze(0)
        x, y = cols - (self.width - 1) / 2, (self.height - 1) / 2 - rows
        cos, sin = math.cos(angle), math.sin(angle)
        source_x, source_y = cos * x + sin * y, -sin * x + cos * y   # R(-angle)·p, then undo the mirror
        if mirror:
            source_x = -source_x
        wx, wy = self.frequencies[..., 0, None, None], self.frequencies[..., 1, None, None]
        waves = self.amplitudes[..., None, None] * torch.cos(wx * source_x + wy * source_y + self.phases[..., None, None])
        return (waves.sum(2) * disk_window(self.height, self.width)).to(dtype)

    def moved(self, group: Group, g: int, dtype: torch.dtype = torch.float32) -> torch.Tensor:
        """The sample moved by group element g (exactly, whatever the angle)."""
        return self.sample(group.angle(g), group.is_mirror(g), dtype)


@dataclass(frozen=True)
class ElementError:
    """The equivariance error of one value (a layer's output, or the model's) under one group element."""

    value: str          # module path, or "output"
    layout: str         # the value's layout, as written by str(layout)
    element: int        # group element index
    degrees: float      # its rotation angle
    mirror: bool        # whether it mirrors first
    exact: bool         # whether it acts exactly (a quarter-turn multiple, possibly mirrored)
    error: float        # ‖f(g·x) − g·f(x)‖ / ‖g·f(x)‖ over the batch, on the central disk of spatial maps


def approximate_errors(model: nn.Module, group: Group, images: torch.Tensor | SmoothPattern,
                       layouts: Mapping[str, Layout] | None = None, *, output_layout: Layout | None = None,
                       elements: Iterable[int] | None = None, window: bool = True,
                       scale: str = "value") -> list[ElementError]:
    """Equivariance errors of ``model`` (its output and, optionally, inner layers) under ``group``.

    Args:
        model: the model; run in its current mode under ``torch.no_grad`` (put it in eval mode first).
        group: any group; for exact ones the errors are those of exact actions, for approximate ones
            see the module docstring.
        images: a :class:`SmoothPattern` (moved exactly, by sampling), or (N, C, H, W) images, best
            smooth ones, moved by :func:`orbify.symmetry.layouts.act` (interpolation off the 90° grid).
        layouts: module path → layout of that module's output (e.g. from the conversion plan: layer
            target → ``layout_out``); flattened maps (:class:`~orbify.symmetry.layouts.Flat`) are skipped, since
            they have no disk to compare on.
        output_layout: layout of the model's output; default :class:`~orbify.symmetry.layouts.Plain`, so a
            (B, C) output is compared unchanged (invariance) and a spatial one rotated (a map head).
        elements: the element indices to measure; default all but the identity.
        window: multiply image tensors by :func:`disk_window` first (recommended for approximate groups;
            a pattern is always windowed).
        scale: what an error is relative to: "value", ‖g·f(x)‖; or "spread", ‖g·f(x) − its batch mean‖,
            how much the value differs between the images of the batch (needs two images or more). A
            converted model whose output hardly depends on the image (orbit averaging can leave one so
            before tuning) has small errors relative to its value and large ones relative to its spread.

    Returns:
        One :class:`ElementError` per (value, element): every layer in ``layouts`` order, then "output".
    """
    check_choice("scale", scale, SCALES)
    moved_inputs = _input_mover(model, group, images, window)
    layouts = {path: layout for path, layout in (layouts or {}).items() if not isinstance(layout, Flat)}
    elements = list(range(1, group.order) if elements is None else elements)
    recorded: dict[str, torch.Tensor] = {}

    def recorder(path: str):
        def record(module, args, output):
            if isinstance(output, torch.Tensor):
                recorded[path] = output.clone()   # an in-place op later (ReLU) must not change it
        return record

    handles = [model.get_submodule(path).register_forward_hook(recorder(path)) for path in layouts]
    try:
        with torch.no_grad():
            reference = _values(model, moved_inputs(0), recorded)
            out_layout = output_layout or Plain(reference["output"].shape[1])
            all_layouts = {**layouts, "output": out_layout}
            results = {name: [] for name in all_layouts}
            for g in elements:
                moved = _values(model, moved_inputs(g), recorded)
                for name, layout in all_layouts.items():
                    expected = act(group, layout, g, reference[name])
                    results[name].append(_disk_error(moved[name], expected, scale == "spread"))
    finally:
        for handle in handles:
            handle.remove()
    k_of = group.elements
    return [ElementError(name, str(all_layouts[name]), g, k_of[g][0] * 360 / group.rotations, bool(k_of[g][1]),
                         group.acts_exactly(g), error)
            for name, errors in results.items() for g, error in zip(elements, errors)]


def worst_errors(errors: Sequence[ElementError]) -> dict[str, tuple[float, float]]:
    """Per value: (largest error over exactly acting elements, largest over the others); NaN where none."""
    out: dict[str, list[float]] = {}
    for e in errors:
        pair = out.setdefault(e.value, [math.nan, math.nan])
        slot = 0 if e.exact else 1
        pair[slot] = e.error if math.isnan(pair[slot]) else max(pair[slot], e.error)
    return {value: (pair[0], pair[1]) for value, pair in out.items()}


def _input_mover(model: nn.Module, group: Group, images: torch.Tensor | SmoothPattern,
                 window: bool) -> Callable[[int], torch.Tensor]:
    """g ↦ the input moved by element g, in the model's dtype and on its device."""
    reference = next(iter(model.parameters()), None)
    dtype = reference.dtype if reference is not None and reference.is_floating_point() else torch.float32
    device = reference.device if reference is not None else torch.device("cpu")
    if isinstance(images, SmoothPattern):
        return lambda g: images.moved(group, g, dtype).to(device)
    if images.dim() != 4:
        raise InputShapeError(f"images must be (N, C, H, W), got shape {tuple(images.shape)}",
                              where="orbify.verification.approximate.approximate_errors", fix="stack the images into one 4-d tensor")
    images = images.to(device, dtype)
    if window:
        images = images * disk_window(*images.shape[-2:]).to(device, dtype)
    return lambda g: act(group, Plain(images.shape[1]), g, images)


def _values(model: nn.Module, images: torch.Tensor, recorded: dict[str, torch.Tensor]) -> dict[str, torch.Tensor]:
    recorded.clear()
    output = model(images)
    if not isinstance(output, torch.Tensor):
        raise InputShapeError(f"The model returns a {type(output).__name__}, not a tensor",
                              where="orbify.verification.approximate.approximate_errors", fix="check a model that returns one tensor")
    return {**recorded, "output": output}


def _disk_error(value: torch.Tensor, expected: torch.Tensor, centred: bool) -> float:
    """‖value − expected‖ / ‖expected‖ (or / ‖expected − batch mean‖), on the central disk for spatial maps."""
    difference = value - expected
    reference = expected - expected.mean(0, keepdim=True) if centred else expected
    if value.dim() >= 4:
        mask = central_disk_mask(*value.shape[-2:]).to(value.device)
        difference, reference = difference[..., mask], reference[..., mask]
    norm = float(reference.norm())
    diff = float(difference.norm())
    if norm == 0.0:
        return 0.0 if diff == 0.0 else math.inf
    return diff / norm


__all__ = ["ElementError", "SmoothPattern", "approximate_errors", "disk_window", "worst_errors"]
