"""Micrograph scenes for the bundled segmentation example: several particles per image, and their mask.

The scenario of :mod:`orbify.example.data`, one step further: the microscope's field of view holds a
few particles of the six shapes, and a segmentation model labels every pixel with the shape it
belongs to (0 for the background). The training scenes show every particle upright (±10°, never
mirrored); in the field each particle lies at its own angle, mirrored half the time. Particles,
background, tints and noise are drawn exactly as for the tiles (the same functions); the mask is
the particle outline itself (the pixels where its coverage passes one half), the particle drawn
last on top where two touch.
"""

from __future__ import annotations

import numpy as np
import torch

from orbify.example.data import (
    CLASS_NAMES,
    SPLITS,
    Split,
    add_noise,
    check_draw_arguments,
    draw_background,
    draw_particles,
    draw_tints,
    normalise,
    pixel_grid,
)

SEGMENT_CLASSES: tuple[str, ...] = ("background", *CLASS_NAMES)
"""Mask values: 0 the background, ``1 + k`` the particle class ``CLASS_NAMES[k]``."""

SCENE_SIZE = 49
"""Default scene side in pixels: safe for the example segmenter's two stride-2 3×3 convs (49 → 25 → 13, each
odd, so that quarter turns and mirrors map every sampling grid onto itself; ``orbify.safe_sizes`` agrees)."""

PARTICLE_UNIT = 0.8
"""Pixels per outline unit (the tiles of :mod:`orbify.example.data` use 1 at 33 px): a particle spans at most
about 2 × 11 × 0.8 × 1.15 ≈ 20 pixels."""

PARTICLES_PER_SCENE = (2, 4)
"""Fewest and most particles a scene tries to place (a particle with no free spot after a few tries is left out)."""

_REACH = 11.0 * 1.15 * PARTICLE_UNIT   # farthest outline point from a particle's centre, in pixels
_SPACING = 1.6 * _REACH                 # least distance between two centres: outlines touch rarely
_TRIES = 30
_CHUNK = 64  # scenes rendered at a time


def _place(rng: np.random.Generator, n: int, size: int) -> tuple[np.ndarray, np.ndarray]:
    """Centres (m, 2) of every particle of ``n`` scenes and the scene each belongs to (m,), in drawing order."""
    limit = (size - 1) / 2.0 - 0.6 * _REACH
    centres, owners = [], []
    for scene in range(n):
        placed: list[np.ndarray] = []
        for _ in range(rng.integers(PARTICLES_PER_SCENE[0], PARTICLES_PER_SCENE[1] + 1)):
            for _ in range(_TRIES):
                candidate = rng.uniform(-limit, limit, 2)
                if all(np.hypot(*(candidate - other)) >= _SPACING for other in placed):
                    placed.append(candidate)
                    break
        centres += placed
        owners += [scene] * len(placed)
    return np.asarray(centres, dtype=np.float64).reshape(-1, 2), np.asarray(owners, dtype=np.int64)


def _render(rng: np.random.Generator, n: int, split: str, size: int) -> tuple[np.ndarray, np.ndarray]:
    """Scenes with values in [0, 1], (n, 3, size, size), and their masks (n, size, size)."""
    grid = pixel_grid(size)
    centres, owners = _place(rng, n, size)
    labels = rng.integers(0, len(CLASS_NAMES), len(owners))
    particles = draw_particles(rng, labels, split, grid, PARTICLE_UNIT, lambda rng, m: centres)
    level = draw_background(rng, n, grid)
    background_tint, particle_tint = draw_tints(rng, n, len(owners))
    images = background_tint[:, :, None, None] * level[:, None]
    masks = np.zeros((n, size, size), dtype=np.int64)
    for index, (scene, label) in enumerate(zip(owners, labels)):   # in drawing order: the last one on top
        coverage = particles.coverage[index]
        colour = particle_tint[index, :, None, None] * particles.texture[index]
        images[scene] += coverage * (colour - images[scene])
        masks[scene][coverage > 0.5] = 1 + label
    return add_noise(rng, images), masks


def make_scenes(n: int, *, split: Split = "upright", size: int = SCENE_SIZE,
                seed: int = 0) -> tuple[torch.Tensor, torch.Tensor]:
    """Generate ``n`` micrograph scenes of 2 to 4 particles each, with their masks.

    ``split="upright"`` draws every particle within ±10° of its canonical orientation, never mirrored
    (the training set); ``split="any"`` gives each particle its own uniform angle and mirrors half of
    them (the field). Particle classes are drawn uniformly.

    Returns ``(images, masks)``: float32 (n, 3, size, size), normalised like the tiles
    (:func:`orbify.example.data.normalise`), and int64 (n, size, size) with values in
    ``range(len(SEGMENT_CLASSES))``. The same arguments always give identical tensors.
    Raises :class:`orbify.errors.OptionError` for an unknown split, a negative count or seed, or a
    size below 9 pixels.
    """
    check_draw_arguments("scenes.make_scenes", n, split, size, seed)
    rng = np.random.default_rng([seed, SPLITS.index(split), size, len(SEGMENT_CLASSES)])
    images = np.empty((n, 3, size, size), dtype=np.float32)
    masks = np.empty((n, size, size), dtype=np.int64)
    for start in range(0, n, _CHUNK):  # bounded memory for large n
        chosen = slice(start, min(start + _CHUNK, n))
        pixels, masks[chosen] = _render(rng, chosen.stop - chosen.start, split, size)
        images[chosen] = normalise(pixels)
    return torch.from_numpy(images), torch.from_numpy(masks)
