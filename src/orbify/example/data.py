"""Procedurally generated micrograph tiles for the bundled example.

The scenario: a particle-sorting microscope photographs one particle per tile. The training
set was shot with every particle lying *upright* (aligned on a slide, at most ±10° off), but in
the *field* particles drift in solution and arrive at any angle, mirrored half the time. A plain
CNN trained on the upright tiles does well upright and poorly in the field; a rotation-tied
model should not care.

Each tile is an RGB image: a tinted background with an illumination gradient and a blotchy
low-frequency texture, one bright particle with lattice fringes that turn with it, and pixel
noise. The six particle shapes are chosen so that no class is a rotated or mirrored copy of
another, so every label stays correct at every orientation.
"""

from __future__ import annotations

from typing import Callable, Literal

import numpy as np
import torch
import torch.nn.functional as F

from orbify.errors import OptionError

CLASS_NAMES: tuple[str, ...] = ("rod", "ring", "cross", "triangle", "crescent", "dumbbell")
"""Particle classes; the label of a tile is the index of its class in this tuple."""

DEFAULT_SIZE = 33
"""Default tile side in pixels. Odd on purpose: with 3x3 stride-2 padding-1 convolutions,
33 -> 17 -> 9 -> 5 keeps every sampling grid centred, so 90° rotations stay exact."""

CHANNEL_MEAN: tuple[float, float, float] = (0.302, 0.313, 0.357)
CHANNEL_STD: tuple[float, float, float] = (0.146, 0.105, 0.066)
"""Per-channel statistics used to normalise tiles; measured once on 4000 'upright' tiles
(seed 0, size 33) and rounded. Field tiles share them (only the particle angle differs)."""

Split = Literal["upright", "any"]
SPLITS: tuple[str, ...] = ("upright", "any")

_UPRIGHT_JITTER_DEG = 10.0
_MIN_SIZE = 9
_CHUNK = 256  # tiles rendered at a time
_NOISE_GRID = 6  # side of the coarse random grid that is upsampled into blotchy texture

# Shape outlines in the particle's own frame: u to the right, v up, units of pixels at size 33.
# Each returns a signed distance (negative inside) evaluated elementwise.


def _capsule(u: np.ndarray, v: np.ndarray, half_length: float, radius: float) -> np.ndarray:
    """Distance to a horizontal segment of the given half length, minus the radius."""
    along = np.maximum(np.abs(u) - half_length, 0.0)
    return np.hypot(along, v) - radius


def _box(u: np.ndarray, v: np.ndarray, half_u: float, half_v: float) -> np.ndarray:
    """Signed distance to an axis-aligned rectangle centred at the origin."""
    qu, qv = np.abs(u) - half_u, np.abs(v) - half_v
    outside = np.hypot(np.maximum(qu, 0.0), np.maximum(qv, 0.0))
    return outside + np.minimum(np.maximum(qu, qv), 0.0)


def _rod(u: np.ndarray, v: np.ndarray) -> np.ndarray:
    return _capsule(u, v, half_length=8.5, radius=2.5)


def _ring(u: np.ndarray, v: np.ndarray) -> np.ndarray:
    return np.abs(np.hypot(u, v) - 7.0) - 1.6


def _cross(u: np.ndarray, v: np.ndarray) -> np.ndarray:
    # Arms of unequal length (long vertical, short horizontal): a Latin cross, not a plus sign.
    return np.minimum(_box(u, v, 2.0, 9.5), _box(u, v - 3.0, 6.5, 2.0))


def _triangle(u: np.ndarray, v: np.ndarray) -> np.ndarray:
    # Equilateral, pointing up, circumradius 9.5 (inradius 4.75); the largest of the three
    # edge distances is exact inside and close enough outside for a one-pixel edge ramp.
    inradius = 4.75
    normals = ((0.0, -1.0), (np.cos(np.pi / 6), np.sin(np.pi / 6)), (-np.cos(np.pi / 6), np.sin(np.pi / 6)))
    return np.max(np.stack([nu * u + nv * v - inradius for nu, nv in normals]), axis=0)


def _crescent(u: np.ndarray, v: np.ndarray) -> np.ndarray:
    # A disk with a shifted disk cut away: horns point right.
    return np.maximum(np.hypot(u, v) - 8.0, -(np.hypot(u - 4.5, v) - 7.0))


def _dumbbell(u: np.ndarray, v: np.ndarray) -> np.ndarray:
    knobs = np.hypot(np.abs(u) - 7.0, v) - 3.5
    return np.minimum(knobs, _capsule(u, v, half_length=7.0, radius=1.2))


_OUTLINES: tuple[Callable[[np.ndarray, np.ndarray], np.ndarray], ...] = (
    _rod, _ring, _cross, _triangle, _crescent, _dumbbell,
)


def _check_arguments(n: int, split: str, size: int, seed: int) -> None:
    if split not in SPLITS:
        raise OptionError(
            f"unknown tile split {split!r}",
            where="orbify.example.data.make_tiles(split=...)",
            fix=f"use one of {', '.join(SPLITS)}",
        )
    if not isinstance(n, int) or n < 0:
        raise OptionError(
            f"tile count must be a non-negative integer, got {n!r}",
            where="orbify.example.data.make_tiles(n)",
            fix="pass n >= 0",
        )
    if not isinstance(seed, int) or seed < 0:
        raise OptionError(
            f"seed must be a non-negative integer, got {seed!r}",
            where="orbify.example.data.make_tiles(seed=...)",
            fix="pass seed >= 0",
        )
    if not isinstance(size, int) or size < _MIN_SIZE:
        raise OptionError(
            f"tile size must be an integer of at least {_MIN_SIZE} pixels, got {size!r}",
            where="orbify.example.data.make_tiles(size=...)",
            fix=f"use the default {DEFAULT_SIZE} or another odd size such as 65",
        )


def _particle_angles(rng: np.random.Generator, n: int, split: str) -> tuple[np.ndarray, np.ndarray]:
    """Rotation angle (radians, counter-clockwise) and mirror flag of every particle."""
    if split == "upright":
        degrees = rng.uniform(-_UPRIGHT_JITTER_DEG, _UPRIGHT_JITTER_DEG, n)
        mirrored = np.zeros(n, dtype=bool)
    else:
        degrees = rng.uniform(0.0, 360.0, n)
        mirrored = rng.random(n) < 0.5
    return np.deg2rad(degrees), mirrored


def _blotches(rng: np.random.Generator, n: int, size: int) -> np.ndarray:
    """Smooth random fields in about [-1, 1], shape (n, size, size)."""
    coarse = torch.from_numpy(rng.standard_normal((n, 1, _NOISE_GRID, _NOISE_GRID)).astype(np.float32))
    smooth = F.interpolate(coarse, size=(size, size), mode="bicubic", align_corners=True)
    return smooth[:, 0].numpy() / 2.0


def _render(rng: np.random.Generator, labels: np.ndarray, split: str, size: int) -> np.ndarray:
    """Draw tiles with values in [0, 1], shape (n, 3, size, size)."""
    n = labels.shape[0]
    unit = size / DEFAULT_SIZE
    centre = (size - 1) / 2.0
    x = np.arange(size, dtype=np.float64) - centre
    grid_x, grid_y = np.meshgrid(x, -x)  # y up, so counter-clockwise angles look counter-clockwise

    angles, mirrored = _particle_angles(rng, n, split)
    scale = unit * rng.uniform(0.85, 1.15, n)
    shift = unit * rng.uniform(-3.0, 3.0, (n, 2))
    px = grid_x[None] - shift[:, 0, None, None]
    py = grid_y[None] - shift[:, 1, None, None]
    cos, sin = np.cos(angles)[:, None, None], np.sin(angles)[:, None, None]
    # Particle frame = inverse of (mirror, then rotate): rotate back, then mirror.
    u = (cos * px + sin * py) / scale[:, None, None]
    v = (-sin * px + cos * py) / scale[:, None, None]
    u = np.where(mirrored[:, None, None], -u, u)

    distance = np.empty((n, size, size))
    for label, outline in enumerate(_OUTLINES):
        chosen = labels == label
        distance[chosen] = outline(u[chosen], v[chosen]) * scale[chosen, None, None]
    coverage = 1.0 / (1.0 + np.exp(distance / 0.45))  # soft one-pixel edge

    fringe_period = rng.uniform(3.5, 5.0, n)[:, None, None]
    fringe_phase = rng.uniform(0.0, 2 * np.pi, n)[:, None, None]
    fringe_depth = rng.uniform(0.08, 0.2, n)[:, None, None]
    fringes = 1.0 + fringe_depth * np.sin(2 * np.pi * u * scale[:, None, None] / fringe_period + fringe_phase)
    particle_texture = fringes * (1.0 + 0.12 * _blotches(rng, n, size))

    slope_angle = rng.uniform(0.0, 2 * np.pi, n)[:, None, None]
    slope = rng.uniform(0.0, 0.2, n)[:, None, None]
    gradient = slope * (np.cos(slope_angle) * grid_x + np.sin(slope_angle) * grid_y) / size
    background_level = 1.0 + gradient + 0.08 * _blotches(rng, n, size)

    background_tint = np.array([0.25, 0.28, 0.35]) + rng.uniform(-0.05, 0.05, (n, 3))
    particle_tint = np.array([0.85, 0.68, 0.48]) * rng.uniform(0.75, 1.0, (n, 1)) + rng.uniform(-0.06, 0.06, (n, 3))
    noise_level = rng.uniform(0.03, 0.07, (n, 1, 1, 1))

    background = background_tint[:, :, None, None] * background_level[:, None]
    particle = particle_tint[:, :, None, None] * particle_texture[:, None]
    image = background + coverage[:, None] * (particle - background)
    image = image + noise_level * rng.standard_normal(image.shape)
    return np.clip(image, 0.0, 1.0)


def make_tiles(
    n: int, *, split: Split = "upright", size: int = DEFAULT_SIZE, seed: int = 0
) -> tuple[torch.Tensor, torch.Tensor]:
    """Generate ``n`` labelled micrograph tiles.

    ``split="upright"`` draws every particle at its canonical orientation within ±10°, never
    mirrored (the training set). ``split="any"`` draws a uniform angle in [0°, 360°) and mirrors
    half of the particles (the field set). Labels cycle through the classes before shuffling,
    so class counts differ by at most one.

    Returns ``(images, labels)``: float32 of shape (n, 3, size, size), normalised per channel
    with :data:`CHANNEL_MEAN` and :data:`CHANNEL_STD`, and int64 of shape (n,) with values in
    ``range(len(CLASS_NAMES))``. The same arguments always give identical tensors.
    Raises :class:`orbify.errors.OptionError` for an unknown split, a negative count or seed, or a
    size below 9 pixels.
    """
    _check_arguments(n, split, size, seed)
    rng = np.random.default_rng([seed, SPLITS.index(split), size])
    labels = rng.permutation(np.arange(n) % len(CLASS_NAMES))
    mean = np.array(CHANNEL_MEAN)[None, :, None, None]
    std = np.array(CHANNEL_STD)[None, :, None, None]
    images = np.empty((n, 3, size, size), dtype=np.float32)
    for start in range(0, n, _CHUNK):  # bounded memory for large n
        chosen = slice(start, start + _CHUNK)
        images[chosen] = (_render(rng, labels[chosen], split, size) - mean) / std
    return torch.from_numpy(images), torch.from_numpy(labels.astype(np.int64))
