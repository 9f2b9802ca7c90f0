"""The user's images: read whole into memory (:mod:`orbify.data.images`) or streamed one tile at a time
(:mod:`orbify.data.tiles`, opened by :mod:`orbify.data.catalog` from folders, CSV manifests, arrays and
tar shards (:mod:`orbify.data.shards`)); single images decoded and prepared by :mod:`orbify.data.decoding`,
segmentation masks by :mod:`orbify.data.masks`; training tiles augmented by :mod:`orbify.data.augment`."""

from orbify.data.augment import AUGMENT_LEVELS, augmentation
from orbify.data.catalog import open_tiles
from orbify.data.decoding import LARGEST_IMAGE_PIXELS
from orbify.data.images import IMAGE_SUFFIXES, ImageSet, evenly_spaced, read_images
from orbify.data.tiles import UNLABELLED, DatasetTiles, Preparation, TensorTiles, Tiles

__all__ = ["AUGMENT_LEVELS", "IMAGE_SUFFIXES", "LARGEST_IMAGE_PIXELS", "UNLABELLED", "DatasetTiles", "ImageSet",
           "Preparation", "TensorTiles", "Tiles", "augmentation", "evenly_spaced", "open_tiles", "read_images"]
