"""The segmentation demo's picture: one scene turned to a few angles, its true mask and every model's mask."""

from __future__ import annotations

import math
from pathlib import Path

import torch
import torch.nn.functional as F
from torch import nn

from orbify.example.data import CHANNEL_MEAN, CHANNEL_STD
from orbify.example.demo_support import pyplot, write_figure
from orbify.example.scenes import SEGMENT_CLASSES
from orbify.symmetry.resample import rotate_images
from orbify.verification.segmentation import dense_output

PICTURE_ANGLES = (0, 30, 90, 135)
"""Counter-clockwise turns of the scene in the picture, in degrees: the upright scene, a turn between the
group's quarter turns, a quarter turn (which every d4 model follows exactly), and a turn between them."""

MASK_COLOURS = ("#202020", "#e6194b", "#3cb44b", "#ffe119", "#4363d8", "#f58231", "#42d4f4")
"""One colour per mask value (background dark), in the order of :data:`~orbify.example.scenes.SEGMENT_CLASSES`."""


def turn_scene(image: torch.Tensor, mask: torch.Tensor, degrees: float) -> tuple[torch.Tensor, torch.Tensor]:
    """``image`` (C, H, W) and its ``mask`` (H, W) turned counter-clockwise by ``degrees`` about the centre.

    The image is interpolated bilinearly (zeros, the mean colour, where the corners leave it; quarter turns are
    exact); the mask is turned as one probability map per class, each pixel taking the class with the most
    weight (the background where nothing lands).
    """
    angle = math.radians(degrees)
    one_hot = F.one_hot(mask, len(SEGMENT_CLASSES)).permute(2, 0, 1).float()
    return rotate_images(image, angle), rotate_images(one_hot, angle).argmax(0)


def write_mask_picture(image: torch.Tensor, mask: torch.Tensor, models: dict[str, nn.Module], path: Path, *,
                       force: bool) -> bool:
    """Draw ``image`` and ``mask`` turned by each of :data:`PICTURE_ANGLES` (one row per angle) beside the mask
    each of ``models`` (used as they are) predicts for the turned scene, and write the PNG to ``path``.

    Creates the folder of ``path`` if needed. Returns False, writing nothing, when matplotlib is not installed.
    """
    plt = pyplot()
    if plt is None:
        return False
    from matplotlib.colors import ListedColormap
    from matplotlib.patches import Patch

    colours = ListedColormap(MASK_COLOURS)
    columns = ["scene", "true mask", *models]
    figure, axes = plt.subplots(len(PICTURE_ANGLES), len(columns), figsize=(1.9 * len(columns),
                                                                            1.9 * len(PICTURE_ANGLES)))
    mean, std = torch.tensor(CHANNEL_MEAN)[:, None, None], torch.tensor(CHANNEL_STD)[:, None, None]
    for row, degrees in zip(axes, PICTURE_ANGLES):
        turned, truth = turn_scene(image, mask, degrees)
        with torch.no_grad():
            predicted = [dense_output(model(turned[None]))[0].argmax(0) for model in models.values()]
        row[0].imshow((turned * std + mean).clamp(0, 1).permute(1, 2, 0).numpy())
        for axis, shown in zip(row[1:], [truth, *predicted]):
            axis.imshow(shown.numpy(), cmap=colours, vmin=0, vmax=len(MASK_COLOURS) - 1, interpolation="nearest")
        row[0].set_ylabel(f"{degrees}°")
    for axis, title in zip(axes[0], columns):
        axis.set_title(title.replace(" (test-time)", "\n(test-time)"), fontsize=8)
    for axis in axes.flat:
        axis.set_xticks([])
        axis.set_yticks([])
    figure.legend(handles=[Patch(color=c, label=n) for c, n in zip(MASK_COLOURS, SEGMENT_CLASSES)],
                  loc="lower center", ncol=len(SEGMENT_CLASSES), fontsize=8)
    figure.suptitle("one scene turned, its true mask and each model's mask")
    path.parent.mkdir(parents=True, exist_ok=True)
    write_figure(plt, figure, path, force)
    return True
