"""The bundled examples: micrograph tiles and scenes, plain models trained on upright ones, and their weights.

``load_example_model()`` returns the trained tile classifier; ``make_tiles`` draws fresh tiles,
upright (like the training set) or at any angle (the field). ``load_example_segmenter()`` returns the
trained segmentation model; ``make_scenes`` draws scenes of several particles with their masks.
``load_example_vit()`` returns the trained vision transformer, a tile classifier for tiles of 32 pixels.
"""

from __future__ import annotations

from importlib import resources
from typing import Callable

from torch import nn

from orbify.common.safe_io import load_torch_weights
from orbify.errors import CheckpointError
from orbify.example.data import CLASS_NAMES, make_tiles
from orbify.example.model import build_example_cnn
from orbify.example.scenes import SEGMENT_CLASSES, make_scenes
from orbify.example.segment_model import build_example_segmenter
from orbify.example.vit_model import VIT_TILE_SIZE, build_example_vit

__all__ = [
    "CLASS_NAMES", "SEGMENT_CLASSES", "SEGMENT_WEIGHTS_FILE", "VIT_TILE_SIZE", "VIT_WEIGHTS_FILE", "WEIGHTS_FILE",
    "build_example_cnn", "build_example_segmenter", "build_example_vit", "load_example_model",
    "load_example_segmenter", "load_example_vit", "make_scenes", "make_tiles",
]

WEIGHTS_FILE = "weights.pt"
"""Name of the shipped state dict of the tile classifier inside the ``orbify.example`` package."""
SEGMENT_WEIGHTS_FILE = "segment_weights.pt"
"""Name of the shipped state dict of the segmentation model inside the ``orbify.example`` package."""
VIT_WEIGHTS_FILE = "vit_weights.pt"
"""Name of the shipped state dict of the vision transformer inside the ``orbify.example`` package."""


def load_example_model() -> nn.Module:
    """The example CNN with the shipped weights, in eval mode.

    The state dict is read from the package file ``orbify/example/weights.pt`` with
    ``torch.load(weights_only=True)`` and loaded with strict key matching. Raises
    :class:`orbify.errors.CheckpointError` when the file is missing, damaged or does not fit.
    """
    return _load_shipped(WEIGHTS_FILE, build_example_cnn, "the example CNN", "orbify.example.train")


def load_example_segmenter() -> nn.Module:
    """The example segmentation model with the shipped weights, in eval mode.

    Read like :func:`load_example_model`, from ``orbify/example/segment_weights.pt``; raises
    :class:`orbify.errors.CheckpointError` when the file is missing, damaged or does not fit.
    """
    return _load_shipped(SEGMENT_WEIGHTS_FILE, build_example_segmenter, "the example segmenter",
                         "orbify.example.train_segment")


def load_example_vit() -> nn.Module:
    """The example vision transformer with the shipped weights, in eval mode; it reads tiles of
    :data:`VIT_TILE_SIZE` = 32 pixels (``make_tiles(n, size=VIT_TILE_SIZE)``).

    Read like :func:`load_example_model`, from ``orbify/example/vit_weights.pt``; raises
    :class:`orbify.errors.CheckpointError` when the file is missing, damaged or does not fit.
    """
    return _load_shipped(VIT_WEIGHTS_FILE, build_example_vit, "the example ViT", "orbify.example.train_vit")


def _load_shipped(file: str, build: Callable[[], nn.Module], what: str, trainer: str) -> nn.Module:
    """``build()`` with the package file ``file`` loaded strictly (``weights_only=True``), in eval mode."""
    with resources.as_file(resources.files(__package__) / file) as path:
        state = load_torch_weights(path, what=f"weights file of {what}")
        model = build()
        try:
            model.load_state_dict(state, strict=True)
        except (RuntimeError, TypeError, AttributeError) as error:
            raise CheckpointError(
                f"The weights file {str(path)!r} does not fit {what} ({error})",
                fix=f"regenerate it: python -m {trainer} --out <that file> --force",
            ) from error
    return model.eval()
