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

from dataclasses import dataclass
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


def check_draw_arguments(function: str, n: int, split: str, size: int, seed: int) -> None:
    """Raise :class:`OptionError` naming ``function`` (e.g. ``"make_tiles"``) for an unknown split, a negative
    count or seed, or a size below 9 pixels."""
    where = f"orbify.example.{function}"
    if split not in SPLITS:
        raise OptionError(f"unknown split {split!r}", where=f"{where}(split=...)",
                          fix=f"use one of {', '.join(SPLITS)}")
    if not isinstance(n, int) or n < 0:
        raise OptionError(f"the count must be a non-negative integer, got {n!r}", where=f"{where}(n)",
                          fix="pass n >= 0")
    if not isinstance(seed, int) or seed < 0:
        raise OptionError(f"seed must be a non-negative integer, got {seed!r}", where=f"{where}(seed=...)",
                          fix="pass seed >= 0")
    if not isinstance(size, int) or size < _MIN_SIZE:
        raise OptionError(f"the size must be an integer of at least {_MIN_SIZE} pixels, got {size!r}",
                          where=f"{where}(size=...)", fix="use an odd size such as 33, 49 or 65")


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


def pixel_grid(size: int) -> tuple[np.ndarray, np.ndarray]:
    """Pixel coordinates (x, y), each (size, size), about the image centre, y up (so counter-clockwise angles look
    counter-clockwise)."""
    x = np.arange(size, dtype=np.float64) - (size - 1) / 2.0
    grid_x, grid_y = np.meshgrid(x, -x)
    return grid_x, grid_y


Placement = Callable[[np.random.Generator, int], np.ndarray]
"""``place(rng, n)``: the (n, 2) centres (x, y; pixels from the image centre, y up) of ``n`` particles."""


@dataclass(frozen=True)
class Particles:
    """Particles drawn on their own, one per row: ``coverage`` (n, H, W) in [0, 1] (above 0.5 exactly inside the
    outline, a soft one-pixel edge) and ``texture`` (n, H, W), the brightness factor of their lattice fringes."""

    coverage: np.ndarray
    texture: np.ndarray


def draw_particles(rng: np.random.Generator, labels: np.ndarray, split: str, grid: tuple[np.ndarray, np.ndarray],
                   unit: float, place: Placement) -> Particles:
    """One particle of class ``labels[i]`` per row, at an angle of ``split`` (see :func:`make_tiles`), ``unit``
    pixels per outline unit (about ±15 %), centred where ``place`` says."""
    n = labels.shape[0]
    grid_x, grid_y = grid
    angles, mirrored = _particle_angles(rng, n, split)
    scale = unit * rng.uniform(0.85, 1.15, n)
    shift = place(rng, n)
    px = grid_x[None] - shift[:, 0, None, None]
    py = grid_y[None] - shift[:, 1, None, None]
    cos, sin = np.cos(angles)[:, None, None], np.sin(angles)[:, None, None]
    # Particle frame = inverse of (mirror, then rotate): rotate back, then mirror.
    u = (cos * px + sin * py) / scale[:, None, None]
    v = (-sin * px + cos * py) / scale[:, None, None]
    u = np.where(mirrored[:, None, None], -u, u)

    distance = np.empty((n, *grid_x.shape))
    for label, outline in enumerate(_OUTLINES):
        chosen = labels == label
        distance[chosen] = outline(u[chosen], v[chosen]) * scale[chosen, None, None]
    coverage = 1.0 / (1.0 + np.exp(distance / 0.45))  # soft one-pixel edge

    fringe_period = rng.uniform(3.5, 5.0, n)[:, None, None]
    fringe_phase = rng.uniform(0.0, 2 * np.pi, n)[:, None, None]
    fringe_depth = rng.uniform(0.08, 0.2, n)[:, None, None]
    fringes = 1.0 + fringe_depth * np.sin(2 * np.pi * u * scale[:, None, None] / fringe_period + fringe_phase)
    return Particles(coverage, fringes * (1.0 + 0.12 * _blotches(rng, n, grid_x.shape[0])))


def draw_background(rng: np.random.Generator, n: int, grid: tuple[np.ndarray, np.ndarray]) -> np.ndarray:
    """Background brightness (n, H, W) about 1: an illumination gradient and a blotchy low-frequency texture."""
    grid_x, grid_y = grid
    size = grid_x.shape[0]
    slope_angle = rng.uniform(0.0, 2 * np.pi, n)[:, None, None]
    slope = rng.uniform(0.0, 0.2, n)[:, None, None]
    gradient = slope * (np.cos(slope_angle) * grid_x + np.sin(slope_angle) * grid_y) / size
    return 1.0 + gradient + 0.08 * _blotches(rng, n, size)


def draw_tints(rng: np.random.Generator, images: int, particles: int) -> tuple[np.ndarray, np.ndarray]:
    """RGB tints: (images, 3) of the backgrounds, (particles, 3) of the particles."""
    background_tint = np.array([0.25, 0.28, 0.35]) + rng.uniform(-0.05, 0.05, (images, 3))
    particle_tint = (np.array([0.85, 0.68, 0.48]) * rng.uniform(0.75, 1.0, (particles, 1))
                     + rng.uniform(-0.06, 0.06, (particles, 3)))
    return background_tint, particle_tint


def add_noise(rng: np.random.Generator, images: np.ndarray) -> np.ndarray:
    """``images`` (n, 3, H, W) with pixel noise of a random level per image, clipped to [0, 1]."""
    noise_level = rng.uniform(0.03, 0.07, (images.shape[0], 1, 1, 1))
    return np.clip(images + noise_level * rng.standard_normal(images.shape), 0.0, 1.0)


def normalise(images: np.ndarray) -> np.ndarray:
    """Pixels in [0, 1] normalised per channel with :data:`CHANNEL_MEAN` and :data:`CHANNEL_STD`."""
    return (images - np.array(CHANNEL_MEAN)[None, :, None, None]) / np.array(CHANNEL_STD)[None, :, None, None]


def _render(rng: np.random.Generator, labels: np.ndarray, split: str, size: int) -> np.ndarray:
    """Draw tiles with values in [0, 1], shape (n, 3, size, size)."""
    n = labels.shape[0]
    unit = size / DEFAULT_SIZE
    grid = pixel_grid(size)
    particles = draw_particles(rng, labels, split, grid, unit, lambda rng, n: unit * rng.uniform(-3.0, 3.0, (n, 2)))
    level = draw_background(rng, n, grid)
    background_tint, particle_tint = draw_tints(rng, n, n)
    background = background_tint[:, :, None, None] * level[:, None]
    particle = particle_tint[:, :, None, None] * particles.texture[:, None]
    return add_noise(rng, background + particles.coverage[:, None] * (particle - background))


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
    check_draw_arguments("data.make_tiles", n, split, size, seed)
    rng = np.random.default_rng([seed, SPLITS.index(split), size])
    labels = rng.permutation(np.arange(n) % len(CLASS_NAMES))
    images = np.empty((n, 3, size, size), dtype=np.float32)
    for start in range(0, n, _CHUNK):  # bounded memory for large n
        chosen = slice(start, start + _CHUNK)
        images[chosen] = normalise(_render(rng, labels[chosen], split, size))
    return torch.from_numpy(images), torch.from_numpy(labels.astype(np.int64))
