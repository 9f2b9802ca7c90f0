"""Rotating filters and images by angles that are not multiples of 90 degrees (docs/design.md §11.1–§11.2).

The groups ``cN``/``dN`` with N not dividing 4 (c8, c16, d8, ...) act on the pixel grid only
approximately; this module holds the numerical core they share.

Conventions (fixed by the project, shared with the groups module):

* A (..., H, W) tensor is displayed with row 0 at the top. Pixel (i, j) sits at the planar point
  ``x = j - (W-1)/2``, ``y = (H-1)/2 - i`` (x to the right, y upwards, origin at the centre).
* A positive angle (radians) rotates counter-clockwise as displayed, the same sense as
  ``torch.rot90(x, 1, dims=(-2, -1))``: a rotated map takes at point p the value the original
  has at R(-angle)·p.
* Mirror is the left-right flip ``x.flip(-1)``, applied *before* the rotation.

Multiples of 90 degrees are always exact pixel permutations (``torch.rot90``); resampling only
covers what is left over.

Filters: ``kernel_rotation_matrix`` gives the matrix M with ``rotated.flatten() = M @ k.flatten()``.

* ``"bilinear"`` (the baseline): bilinear interpolation of the pixel filter, zero outside it.
* ``"harmonic"`` (steerable filters): the filter is read as a band-limited function written in
  circular harmonics, f(r, phi) = sum_{|m| <= m_max} F_m(r) e^{i m phi}, rotated exactly
  (coefficient m times e^{-i m alpha}) and sampled back on the grid. The radial profiles are
  rings centred on the radii where the pixels are, with the angular fall-off of the Gaussian:
  the expansion (Jacobi-Anger) of a Gaussian bump of width ``ell`` placed at polar point
  (rho, psi),

      exp(-|p - q|^2 / 2 ell^2) = sum_m exp(-(r - rho)^2 / 2 ell^2) ive(m, r rho / ell^2) e^{i m (phi - psi)},

  with ``ive`` the exponentially scaled modified Bessel function. The expansion is cut at
  m_max = ceil(pi · r_corner): along the outermost pixel ring, of radius r_corner, neighbouring
  pixels are about one pixel apart, so angular frequencies above pi · r_corner (half a cycle
  per pixel, the Nyquist limit) cannot be told apart on the grid. One such band-limited bump is
  centred on every pixel and their coefficients are fitted to the filter by least squares
  (``pinv`` of their Gram matrix, which is positive definite: the basis spans every pixel
  filter, so nothing is left outside it and M(0) is the identity). Rotating by alpha multiplies
  harmonic m by e^{-i m alpha}, so M(alpha) = G(alpha) · pinv(G(0)) with
  G(alpha)[p, q] = sum_m c_m exp(-(r_p - r_q)^2 / 2 ell^2) ive(m, r_p r_q / ell^2) cos(m (phi_p - alpha - phi_q)),
  c_0 = 1, c_m = 2.

The width ``ell`` = 0.7 px was chosen by measurement: narrower bumps fit smooth filters worse,
wider ones gain little and amplify some filters more (benchmarks/README.md, "Finer rotations":
accuracy against gain of the resampling matrix).
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable
from typing import Literal

import torch
import torch.nn.functional as F
from scipy.special import ive

from orbify.errors import InputShapeError, OptionError

Method = Literal["harmonic", "bilinear"]
METHODS: tuple[str, ...] = ("harmonic", "bilinear")

#: Width (pixels) of the Gaussian bumps of the harmonic method; see the module docstring.
HARMONIC_WIDTH = 0.7

#: With a lowered angular cut-off the band-limited bumps no longer span every pixel filter and some
#: nearly coincide; the fit drops the Gram directions below this fraction of the largest eigenvalue.
#: Chosen by the largest gain of M(45°) it allows (benchmarks/README.md, "Finer rotations").
BAND_FIT_RTOL = 1e-2

_QUARTER = math.pi / 2
#: Angles this close (radians) to a multiple of 90 degrees are treated as that multiple.
_SNAP = 1e-9


def kernel_rotation_matrix(size: int, angle: float, method: Method = "harmonic",
                           max_frequency: int | None = None) -> torch.Tensor:
    """Matrix (size², size², float64) rotating a size×size filter counter-clockwise by ``angle``.

    ``rotated.flatten() = M @ kernel.flatten()``, about the filter centre, in the sense of
    ``torch.rot90``. The angle is split into whole quarter turns, done exactly by a pixel
    permutation, and a remainder in [-45°, 45°) resampled by ``method`` ("harmonic" or
    "bilinear"). At multiples of 90° M is exactly the ``rot90`` permutation. ``max_frequency``
    (harmonic only) cuts the expansion at that angular frequency instead of the grid's limit: the
    resampled filter then keeps only its band |m| ≤ max_frequency (see :data:`BAND_FIT_RTOL`).
    Matrices are cached per (size, angle rounded to 1e-12 rad, method, max_frequency); each call
    returns a fresh copy.
    """
    if isinstance(size, bool) or not isinstance(size, int) or size < 1:
        raise OptionError(f"kernel size must be a positive integer, got {size!r}",
                          where="orbify.symmetry.resample.kernel_rotation_matrix", fix="pass the filter's side length")
    if method not in METHODS:
        raise OptionError(f"unknown filter rotation method {method!r}",
                          where="orbify.symmetry.resample.kernel_rotation_matrix",
                          fix=f"use one of {', '.join(METHODS)}")
    _check_angle(angle, "orbify.symmetry.resample.kernel_rotation_matrix")
    if max_frequency is not None and (method != "harmonic" or isinstance(max_frequency, bool)
                                      or not isinstance(max_frequency, int) or max_frequency < 0):
        raise OptionError(f"max_frequency must be a whole number ≥ 0 for the harmonic method, got {max_frequency!r} "
                          f"with {method!r}", where="orbify.symmetry.resample.kernel_rotation_matrix",
                          fix="leave it None (the grid's limit) or use the harmonic method")
    return _cached_kernel_rotation_matrix(size, round(float(angle), 12), method, max_frequency).clone()


def rotate_images(x: torch.Tensor, angle: float, *, mirror: bool = False) -> torch.Tensor:
    """Rotate a batch (..., H, W) counter-clockwise by ``angle`` (radians) about the image centre.

    With ``mirror`` the images are flipped left-right (``flip(-1)``) first. Multiples of 90° use
    ``torch.rot90`` (exact, and (H, W) becomes (W, H) for odd quarter turns); other angles use
    bilinear interpolation with zeros outside the image and keep the shape (H, W). Compare such
    results on :func:`central_disk_mask` only: the corners leave the image.
    """
    if x.dim() < 2:
        raise InputShapeError(f"images must have at least 2 dimensions (..., H, W), got shape {tuple(x.shape)}",
                              where="orbify.symmetry.resample.rotate_images", fix="pass a tensor shaped (..., H, W)")
    _check_angle(angle, "orbify.symmetry.resample.rotate_images")
    if mirror:
        x = x.flip(-1)
    quarter_turns, remainder = _split_quarter_turns(angle)
    if remainder == 0.0:
        return torch.rot90(x, quarter_turns, dims=(-2, -1))
    if not x.is_floating_point():
        raise InputShapeError(f"rotating by {math.degrees(angle):g}° interpolates, which needs floating-point "
                              f"images, got {x.dtype}", where="orbify.symmetry.resample.rotate_images",
                              fix="convert the images with .float()")
    return _bilinear_rotate(x, angle)


def central_disk_mask(h: int, w: int) -> torch.Tensor:
    """Boolean (h, w) mask of the pixels within the inscribed disk, less a 1-pixel margin.

    A pixel is kept when its centre lies within (min(h, w) - 1) / 2 - 1 of the image centre. Under
    any rotation about the centre such a pixel draws only on pixels inside the image, so rotated
    maps can be compared there without edge effects.
    """
    if h < 1 or w < 1:
        raise InputShapeError(f"image size must be at least 1×1, got {h}×{w}", where="orbify.symmetry.resample.central_disk_mask")
    x, y = _pixel_coordinates(h, w)
    radius = (min(h, w) - 1) / 2 - 1
    return x**2 + y**2 <= radius**2


def _check_angle(angle: float, where: str) -> None:
    if not math.isfinite(angle):
        raise OptionError(f"rotation angle must be a finite number of radians, got {angle!r}", where=where)


def _split_quarter_turns(angle: float) -> tuple[int, float]:
    """(q, r) with angle = q·90° + r, q in 0..3 and r in [-45°, 45°); r snapped to 0 near 0."""
    turns = math.floor(angle / _QUARTER + 0.5)
    remainder = angle - turns * _QUARTER
    return turns % 4, (0.0 if abs(remainder) < _SNAP else remainder)


def _pixel_coordinates(h: int, w: int, dtype: torch.dtype = torch.float64) -> tuple[torch.Tensor, torch.Tensor]:
    """Planar coordinates (x right, y up, origin at the centre) of the (h, w) pixel centres."""
    rows = torch.arange(h, dtype=dtype).unsqueeze(1)
    cols = torch.arange(w, dtype=dtype).unsqueeze(0)
    return (cols - (w - 1) / 2).expand(h, w), ((h - 1) / 2 - rows).expand(h, w)


def _bilinear_rotate(x: torch.Tensor, angle: float) -> torch.Tensor:
    """Bilinear rotation (zeros outside) keeping the shape; the grid is built in pixel units."""
    h, w = x.shape[-2:]
    px, py = _pixel_coordinates(h, w)
    cos, sin = math.cos(angle), math.sin(angle)
    source_col = cos * px + sin * py + (w - 1) / 2  # source point R(-angle)·p, back in pixel indices
    source_row = (h - 1) / 2 - (-sin * px + cos * py)
    # align_corners=False: pixel j covers [j - 1/2, j + 1/2] and its centre maps to (2j + 1)/w - 1.
    grid = torch.stack(((2 * source_col + 1) / w - 1, (2 * source_row + 1) / h - 1), dim=-1)
    grid = grid.to(dtype=x.dtype, device=x.device).unsqueeze(0)
    flat = x.reshape(1, -1, h, w)
    rotated = F.grid_sample(flat, grid, mode="bilinear", padding_mode="zeros", align_corners=False)
    return rotated.reshape(x.shape)


def _matrix_of(linear_map: Callable[[torch.Tensor], torch.Tensor], size: int) -> torch.Tensor:
    """Matrix of a linear map on size×size filters, found by applying it to every unit filter."""
    unit_filters = torch.eye(size * size, dtype=torch.float64).reshape(-1, size, size)
    return linear_map(unit_filters).reshape(size * size, size * size).T


@functools.lru_cache(maxsize=512)
def _cached_kernel_rotation_matrix(size: int, angle: float, method: str, max_frequency: int | None) -> torch.Tensor:
    quarter_turns, remainder = _split_quarter_turns(angle)
    permutation = _matrix_of(lambda k: torch.rot90(k, quarter_turns, dims=(-2, -1)), size)
    if remainder == 0.0:
        return permutation
    if method == "bilinear":
        resample = _matrix_of(lambda k: _bilinear_rotate(k, remainder), size)
    else:
        resample = _harmonic_resample_matrix(size, remainder, max_frequency)
    return permutation @ resample


def _harmonic_resample_matrix(size: int, angle: float, max_frequency: int | None) -> torch.Tensor:
    """M(angle) = G(angle) · pinv(G(0)): fit the band-limited expansion, rotate it, sample it back."""
    weights, phase_difference, fit = _harmonic_expansion(size, max_frequency)
    frequencies = torch.arange(len(weights), dtype=torch.float64)[:, None, None]
    return (weights * torch.cos(frequencies * (phase_difference - angle))).sum(0) @ fit


@functools.lru_cache(maxsize=32)
def _harmonic_expansion(size: int, band: int | None = None) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """The angle-free parts of G(angle) for size×size filters (see the module docstring).

    Returns the weights c_m exp(-(r_p - r_q)^2 / 2 ell^2) ive(m, r_p r_q / ell^2), shaped
    (m_max + 1, size², size²), the phase differences phi_p - phi_q and the fit pinv(G(0)).
    ``band`` lowers m_max (then the fit drops the Gram directions below BAND_FIT_RTOL).
    Internal and cached: never modify the returned tensors.
    """
    x, y = _pixel_coordinates(size, size)
    radius, phase = torch.hypot(x, y).flatten(), torch.atan2(y, x).flatten()
    max_frequency = math.ceil(math.pi * radius.max().item())
    if band is not None:
        max_frequency = min(max_frequency, band)
    ring = torch.exp(-((radius[:, None] - radius[None, :]) ** 2) / (2 * HARMONIC_WIDTH**2))
    product = (radius[:, None] * radius[None, :] / HARMONIC_WIDTH**2).numpy()
    weights = torch.stack([(1.0 if m == 0 else 2.0) * ring * torch.from_numpy(ive(m, product))
                           for m in range(max_frequency + 1)])
    phase_difference = phase[:, None] - phase[None, :]
    frequencies = torch.arange(max_frequency + 1, dtype=torch.float64)[:, None, None]
    gram_at_zero = (weights * torch.cos(frequencies * phase_difference)).sum(0)
    rtol = None if band is None else BAND_FIT_RTOL
    return weights, phase_difference, torch.linalg.pinv(gram_at_zero, hermitian=True, rtol=rtol)
