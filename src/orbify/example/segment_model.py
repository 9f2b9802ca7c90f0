"""The bundled segmentation example's plain encoder–decoder: the kind of dense model ``--head map`` converts.

Conv–batchnorm–ReLU blocks (:func:`orbify.example.model.conv_block`): a full-resolution stem, two
stride-2 blocks down (49 → 25 → 13 on the example's scenes), two context blocks, bilinear upsampling
back (to the size of the layer it returns to, corners aligned), a skip connection from the stem
concatenated at full resolution, a 1×1 conv–batchnorm–ReLU head and a 1×1 classifier giving one score map
per class. Every width
is a multiple of 8, so each layer splits into whole orbits under d4. With corners aligned, upsampling
an odd side 2m + 1 from m + 1 puts every second output pixel on an input pixel, and on a safe input
size (every strided conv sees an odd side) quarter turns and mirrors of the input move the output
maps exactly.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F
from torch import nn

from orbify.example.model import conv_block, require_classes
from orbify.example.scenes import SEGMENT_CLASSES

SEGMENTER_WIDTHS = {"stem": 16, "encoder": 32, "decoder": 16, "head": 64}
"""Output channels of the stem, of the down and context blocks, of the decoder blocks and of the 1×1 head block
before the classifier. The head is wide for a converted model's sake: under d4 its classifier may only read what
does not change when a pixel's channels are moved within their orbits, one feature per orbit, and 64 channels are
8 orbits for 7 classes where the decoder's 16 are 2."""


def _upsample(x: torch.Tensor, like: torch.Tensor) -> torch.Tensor:
    """``x`` resized bilinearly to the height and width of ``like``, corners aligned."""
    return F.interpolate(x, size=like.shape[-2:], mode="bilinear", align_corners=True)


class ExampleSegmenter(nn.Module):
    """Plain encoder–decoder for (B, 3, H, W) scenes; returns (B, num_classes, H, W) class scores per pixel.

    No data-dependent control flow, so ``torch.fx.symbolic_trace`` sees the whole graph.
    """

    def __init__(self, num_classes: int = len(SEGMENT_CLASSES)):
        super().__init__()
        stem, encoder, decoder, head = (SEGMENTER_WIDTHS[key] for key in ("stem", "encoder", "decoder", "head"))
        self.stem = conv_block(3, stem, 1)
        self.down1 = conv_block(stem, encoder, 2)
        self.down2 = conv_block(encoder, encoder, 2)
        self.context = nn.Sequential(conv_block(encoder, encoder, 1), conv_block(encoder, encoder, 1))
        self.up = conv_block(encoder, decoder, 1)
        self.fuse = conv_block(decoder + stem, decoder, 1)
        self.head = nn.Sequential(nn.Conv2d(decoder, head, kernel_size=1, bias=False), nn.BatchNorm2d(head),
                                  nn.ReLU(inplace=True))
        self.classifier = nn.Conv2d(head, num_classes, kernel_size=1)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        skip = self.stem(x)
        half = self.down1(skip)
        y = self.context(self.down2(half))
        y = self.up(_upsample(y, half))
        y = self.fuse(torch.cat([_upsample(y, skip), skip], dim=1))
        return self.classifier(self.head(y))


def build_example_segmenter(num_classes: int = len(SEGMENT_CLASSES)) -> ExampleSegmenter:
    """A freshly initialised :class:`ExampleSegmenter` (random weights, training mode).

    Raises :class:`orbify.errors.OptionError` when ``num_classes`` is below 1.
    """
    require_classes(num_classes, "segment_model.build_example_segmenter", len(SEGMENT_CLASSES))
    return ExampleSegmenter(num_classes)
