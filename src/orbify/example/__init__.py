"""The bundled example: micrograph tiles, a plain CNN trained on upright ones, and its weights.

``load_example_model()`` returns the trained CNN; ``make_tiles`` draws fresh tiles, upright
(like the training set) or at any angle (the field).
"""

from __future__ import annotations

from importlib import resources

from torch import nn

from orbify.common.safe_io import load_torch_weights
from orbify.errors import CheckpointError
from orbify.example.data import CLASS_NAMES, make_tiles
from orbify.example.model import build_example_cnn

__all__ = ["CLASS_NAMES", "WEIGHTS_FILE", "build_example_cnn", "load_example_model", "make_tiles"]

WEIGHTS_FILE = "weights.pt"
"""Name of the shipped state dict inside the ``orbify.example`` package."""


def load_example_model() -> nn.Module:
    """The example CNN with the shipped weights, in eval mode.

    The state dict is read from the package file ``orbify/example/weights.pt`` with
    ``torch.load(weights_only=True)`` and loaded with strict key matching. Raises
    :class:`orbify.errors.CheckpointError` when the file is missing, damaged or does not fit.
    """
    with resources.as_file(resources.files(__package__) / WEIGHTS_FILE) as path:
        state = load_torch_weights(path, what="example weights file")
        model = build_example_cnn()
        try:
            model.load_state_dict(state, strict=True)
        except (RuntimeError, TypeError, AttributeError) as error:
            raise CheckpointError(
                f"The example weights file {str(path)!r} does not fit the example CNN ({error})",
                fix="regenerate it: python -m orbify.example.train --out <that file> --force",
            ) from error
    return model.eval()
