"""The user's images: read whole into memory (:mod:`orbify.data.images`) or streamed one tile at a time
(:mod:`orbify.data.tiles`); single images decoded and prepared by :mod:`orbify.data.decoding`."""

from orbify.data.decoding import LARGEST_IMAGE_PIXELS
from orbify.data.images import IMAGE_SUFFIXES, ImageSet, evenly_spaced, read_images

__all__ = ["IMAGE_SUFFIXES", "LARGEST_IMAGE_PIXELS", "ImageSet", "evenly_spaced", "read_images"]
