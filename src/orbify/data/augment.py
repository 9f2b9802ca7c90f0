"""Augmentation of training tiles: random changes a rotation-tied model does not already ignore.

:func:`augmentation` builds a ``torchvision.transforms.v2`` pipeline applied by
:class:`~orbify.data.tiles.Preparation` to a fitted (C, size, size) float image in [0, 1], before
normalisation. The group's own motions (quarter turns, and the mirror of a dN group) would teach
nothing, so only what lies outside the group is drawn: a crop and rescale, a small turn (±10°),
a left-right flip when the group has no mirror images, and brightness/contrast changes; the
``strong`` level adds saturation/hue changes (three channels only) and a slight blur.

Called as ``augment(image, tv_tensors.Mask(mask))`` (dense tiles, :class:`~orbify.data.tiles.Preparation`
does so), one draw moves the image and its mask together: torchvision moves a ``Mask`` by nearest
neighbour and leaves it out of colour changes and blur; the corners a small turn brings in are
filled with :data:`~orbify.data.masks.UNLABELLED` in the mask (the ignore value has become -1 by
then), so no loss or score counts them.

Every random draw comes from torch's global generator, so ``torch.manual_seed(s)`` before a sample
makes its augmentation repeatable (a resumed run draws the same changes).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from orbify.common.options import check_choice
from orbify.data.masks import UNLABELLED
from orbify.data.tiles import Augmentation
from orbify.errors import OptionError

if TYPE_CHECKING:
    from orbify.symmetry.groups import Group

AUGMENT_LEVELS = ("none", "light", "strong")
_CROP_SCALE = (0.6, 1.0)     # the share of the tile a random crop keeps
_TURN_DEGREES = 10.0         # small turns, off the group's own angles for every group up to c36
_JITTER = 0.2                # brightness, contrast (and, when strong, saturation) factors within 1 ± 0.2
_HUE = 0.05                  # hue shift of a strong augmentation, in turns of the colour wheel
_BLUR_SIGMA = (0.1, 1.0)     # the Gaussian blur of a strong augmentation (kernel 3)


def augmentation(level: str, group: Group, size: int, channels: int) -> Augmentation | None:
    """The augmentation of ``level`` (one of :data:`AUGMENT_LEVELS`) for a model tied under ``group``, taking and
    giving (``channels``, ``size``, ``size``) float images in [0, 1]; None for ``"none"``.

    Raises:
        OptionError: an unknown level, or torchvision (which the transforms come from) is not installed.
    """
    check_choice("augment", level, AUGMENT_LEVELS)
    if level == "none":
        return None
    v2, tv_tensors = _transforms(level)
    steps = [v2.RandomResizedCrop(size, scale=_CROP_SCALE, antialias=True),
             v2.RandomRotation(_TURN_DEGREES, interpolation=v2.InterpolationMode.BILINEAR,
                               fill={tv_tensors.Mask: UNLABELLED, "others": 0})]
    if not group.mirror:   # a dN model already treats an image and its mirror alike
        steps.append(v2.RandomHorizontalFlip())
    steps.append(v2.ColorJitter(brightness=_JITTER, contrast=_JITTER))
    if level == "strong":
        if channels == 3:
            steps.append(v2.ColorJitter(saturation=_JITTER, hue=_HUE))
        steps.append(v2.GaussianBlur(kernel_size=3, sigma=_BLUR_SIGMA))
    return v2.Compose(steps)


def _transforms(level: str):
    """torchvision's ``transforms.v2`` and ``tv_tensors`` modules."""
    try:
        from torchvision import tv_tensors
        from torchvision.transforms import v2
    except ImportError as missing:
        raise OptionError(f"The augmentation {level!r} needs torchvision, which is not installed",
                          where="option augment",
                          fix="pip install 'orbify[augment]' (or pip install torchvision), or choose augment 'none'") from missing
    return v2, tv_tensors
