"""Tar shards in webdataset's layout, read by random access.

A shard is an uncompressed tar file whose members are grouped into samples exactly as webdataset
groups them: ``webdataset.tariterators.base_plus_ext`` splits a member name into a key (the path
up to the first dot of the file name) and an extension (the rest, lower-cased); consecutive
members with one key form a sample; names like ``__meta__`` are skipped. A sample's image is its
member with an image extension (``png``, ``jpg``, ...), its label the integer in its ``cls`` member
(every sample has one, or none does), or, for segmentation, its mask the ``mask.png`` member
(``KEY.mask.png``: class indices, :mod:`orbify.data.masks`; every sample has one, or none does).

At open every shard is indexed once with Python's tarfile, reading headers only (and the small
``cls`` members): for each sample its shard and the data offset and size of its image (and mask). Reading
sample ``i`` opens its shard (once per process, and again in a forked worker, whose inherited
handles would share their file position with the parent), seeks, reads those bytes and decodes
them with Pillow. This random access makes the shards a map-style ``Dataset``:
``DistributedSampler`` gives each process its own share of the samples, and a resumed run reads
exactly the samples the interrupted one would have read, which a sequential stream over the shards
could only approximate.

webdataset itself (shard patterns, the key convention) is optional: ``pip install 'orbify[shards]'``.
"""

from __future__ import annotations

import hashlib
import os
import re
import tarfile
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import torch

from orbify.data.decoding import decode_image
from orbify.data.images import IMAGE_SUFFIXES, evenly_spaced
from orbify.data.masks import decode_mask
from orbify.data.tiles import UNLABELLED, PackedStrings, Preparation, Target, Tiles
from orbify.errors import DataError

SHARDS_EXTRA = "pip install 'orbify[shards]' (or pip install webdataset)"
_BRACES = re.compile(r"\{[^{}]*\}")
_META = re.compile(r"__[^/]*__($|/)")   # the members webdataset's tar reader skips (its default skip_meta)
_IMAGE_EXTENSIONS = frozenset(suffix[1:] for suffix in IMAGE_SUFFIXES)
_MASK_EXTENSION = "mask.png"            # KEY.mask.png: the sample's mask of class indices
_LABEL = re.compile(r"[0-9]+")
_OPEN_AT_ONCE = 16                      # shard handles one process keeps open


def is_shard_spec(text: str) -> bool:
    """True for a tar shard path (``.tar``) or a brace pattern of shards (``tiles-{0000..0099}.tar``)."""
    return text.lower().endswith(".tar") or bool(_BRACES.search(text))


def open_shards(spec: str, *, preparation: Preparation, limit: int | None = None) -> ShardTiles:
    """The samples of the shards ``spec`` names (expanded by webdataset's own URL expansion), in shard order.

    ``limit`` keeps at most that many samples, evenly spaced. The fingerprint covers every shard's path, size and
    modification time, and the samples kept.

    Raises:
        DataError: webdataset is not installed; a shard is missing, is not an uncompressed tar file, holds no
            samples, a sample without exactly one image, a malformed ``cls`` label, labels or masks on only some
            samples, or both labels and masks.
    """
    expand_urls, base_plus_ext = _webdataset()
    paths = list(expand_urls(spec))
    index = _Index()
    for shard, path in enumerate(paths):
        _index_shard(path, shard, base_plus_ext, index)
    labelled = _all_or_none(index, paths, [label is not None for label in index.labels], "'cls' label")
    masked = _all_or_none(index, paths, [mask is not None for mask in index.masks], f"{_MASK_EXTENSION!r} mask")
    if labelled and masked:
        raise DataError(f"The samples of {spec!r} have both 'cls' labels and masks", where=spec,
                        fix="write class labels (classification) or masks (segmentation), not both")
    keep = np.asarray(evenly_spaced(len(index.offsets), limit), dtype=np.int64)
    digest = hashlib.sha256(keep.tobytes())
    for path in paths:
        info = os.stat(path)
        digest.update(f"{os.path.abspath(path)}\0{info.st_size}\0{info.st_mtime_ns}\n".encode("utf-8",
                                                                                               "surrogateescape"))
    labels = torch.tensor([index.labels[i] for i in keep], dtype=torch.long) if labelled else None
    masks = _Members.of([index.masks[i] for i in keep]) if masked else None
    return ShardTiles(paths, np.asarray(index.shards, dtype=np.int32)[keep], np.asarray(index.offsets)[keep],
                      np.asarray(index.sizes)[keep], PackedStrings(index.members[i] for i in keep),
                      preparation=preparation, labels=labels, masks=masks,
                      fingerprint=f"shards n={len(paths)} sha256={digest.hexdigest()}")


@dataclass
class _Members:
    """Where some members' bytes lie in their shards: data ``offsets``, ``sizes`` and member ``names``."""

    offsets: np.ndarray
    sizes: np.ndarray
    names: PackedStrings

    @classmethod
    def of(cls, members: list[tarfile.TarInfo]) -> _Members:
        return cls(np.asarray([m.offset_data for m in members], dtype=np.int64),
                   np.asarray([m.size for m in members], dtype=np.int64), PackedStrings(m.name for m in members))


class ShardTiles(Tiles):
    """Samples of tar shards: sample ``i`` is the image bytes at ``offsets[i]`` (``sizes[i]`` long) in the shard
    ``paths[shard_of[i]]``, its member name ``members[i]``; named ``shard.tar:member`` in messages. With ``masks``
    (the samples' ``mask.png`` members in the same shards) the tiles are dense."""

    def __init__(self, paths: list[str], shard_of: np.ndarray, offsets: np.ndarray, sizes: np.ndarray,
                 members: PackedStrings, *, preparation: Preparation, labels: torch.Tensor | None = None,
                 fingerprint: str | None = None, masks: _Members | None = None):
        super().__init__(preparation)
        self.paths, self.shard_of, self.offsets, self.sizes, self.members = paths, shard_of, offsets, sizes, members
        self.labels, self.fingerprint, self.masks, self.dense = labels, fingerprint, masks, masks is not None
        self._files = _OpenShards(paths)

    def __len__(self) -> int:
        return len(self.offsets)

    def read(self, index: int) -> tuple[torch.Tensor, Target]:
        name, shard = self.name(index), int(self.shard_of[index])
        image = decode_image(name, self.preparation.channels,
                             data=self._files.read(shard, int(self.offsets[index]), int(self.sizes[index]), name))
        if self.masks is not None:
            mask_name = self.mask_name(index)
            return image, decode_mask(mask_name, data=self._files.read(shard, int(self.masks.offsets[index]),
                                                                       int(self.masks.sizes[index]), mask_name))
        return image, int(self.labels[index]) if self.labels is not None else UNLABELLED

    def name(self, index: int) -> str:
        return f"{self.paths[int(self.shard_of[index])]}:{self.members[index]}"

    def mask_name(self, index: int) -> str:
        if self.masks is None:
            return super().mask_name(index)
        return f"{self.paths[int(self.shard_of[index])]}:{self.masks.names[index]}"


class _OpenShards:
    """Read-only handles on shards, opened on first use in each process, at most ``_OPEN_AT_ONCE`` at a time."""

    def __init__(self, paths: list[str]):
        self.paths = paths
        self._pid: int | None = None
        self._open: OrderedDict[int, object] = OrderedDict()

    def read(self, shard: int, offset: int, size: int, name: str) -> bytes:
        """``size`` bytes at ``offset`` of shard number ``shard`` (the sample ``name``, for messages)."""
        path = self.paths[shard]
        try:
            handle = self._handle(shard)
            handle.seek(offset)
            data = handle.read(size)
        except OSError as error:
            raise DataError(f"The shard {path!r} cannot be read ({error.strerror or error})", where=name,
                            fix="check that the shard is still there and readable") from error
        if len(data) != size:
            raise DataError(f"The shard {path!r} ends inside {name}: it was cut or changed after it was opened",
                            where=name, fix="open the data again, or restore the shard")
        return data

    def _handle(self, shard: int):
        if self._pid != os.getpid():   # a new process: the handles in hand belong to the parent
            self._open, self._pid = OrderedDict(), os.getpid()
        handle = self._open.pop(shard, None)
        if handle is None:
            if len(self._open) >= _OPEN_AT_ONCE:
                self._open.popitem(last=False)[1].close()
            handle = open(self.paths[shard], "rb", buffering=0)
        self._open[shard] = handle     # most recently used last
        return handle

    def __getstate__(self) -> dict:
        return {"paths": self.paths, "_pid": None, "_open": OrderedDict()}


# -- indexing --------------------------------------------------------------------------------------
@dataclass
class _Index:
    """Per sample: shard number, image data offset and size, image member name, label and mask member (each None
    without)."""

    shards: list[int] = field(default_factory=list)
    offsets: list[int] = field(default_factory=list)
    sizes: list[int] = field(default_factory=list)
    members: list[str] = field(default_factory=list)
    labels: list[int | None] = field(default_factory=list)
    masks: list[tarfile.TarInfo | None] = field(default_factory=list)


def _webdataset() -> tuple[Callable, Callable]:
    """webdataset's URL expansion and its key/extension split of member names."""
    try:
        from webdataset.shardlists import expand_urls
        from webdataset.tariterators import base_plus_ext
    except ImportError as missing:
        raise DataError("Reading tar shards needs the webdataset package, which is not installed",
                        where="tar shards", fix=SHARDS_EXTRA) from missing
    return expand_urls, base_plus_ext


def _index_shard(path: str, shard: int, base_plus_ext: Callable, index: _Index) -> None:
    try:
        with tarfile.open(path, mode="r:") as archive:
            count = _index_samples(archive, path, shard, base_plus_ext, index)
    except FileNotFoundError as error:
        raise DataError(f"The shard {path!r} does not exist", where=path,
                        fix="check the path, or the range of the shard pattern") from error
    except (tarfile.TarError, OSError) as error:
        raise DataError(f"The shard {path!r} is not an uncompressed tar file ({type(error).__name__}: {error})",
                        where=path, fix="write shards as plain .tar files (webdataset.TarWriter, tar -cf)") from error
    if count == 0:
        raise DataError(f"The shard {path!r} holds no images", where=path,
                        fix="remove the shard from the list, or store samples as KEY.png (and KEY.cls) members")


def _index_samples(archive: tarfile.TarFile, path: str, shard: int, base_plus_ext: Callable, index: _Index) -> int:
    """Group the members as webdataset does (consecutive members with one key) and index each sample."""
    count, key, sample = 0, None, {}
    for member in archive:
        if not member.isreg() or _is_meta(member.name):
            continue
        prefix, suffix = base_plus_ext(member.name)
        if prefix is None:
            continue
        if prefix != key:
            count += _index_sample(archive, path, shard, key, sample, index) if sample else 0
            key, sample = prefix, {}
        if suffix.lower() in sample:
            raise DataError(f"The sample {key!r} of the shard {path!r} has two {suffix.lower()!r} members",
                            where=f"{path}:{member.name}", fix="give every member of a sample its own extension")
        sample[suffix.lower()] = member
    return count + (_index_sample(archive, path, shard, key, sample, index) if sample else 0)


def _is_meta(name: str) -> bool:
    """Members webdataset's tar reader skips: ``__name__`` at the top level or as a leading folder."""
    return bool(_META.match(name)) or ("/" not in name and name.startswith("__") and name.endswith("__"))


def _index_sample(archive: tarfile.TarFile, path: str, shard: int, key: str, sample: dict[str, tarfile.TarInfo],
                  index: _Index) -> int:
    images = sorted(suffix for suffix in sample if suffix in _IMAGE_EXTENSIONS)
    if len(images) != 1:
        raise DataError(f"The sample {key!r} of the shard {path!r} has {len(images) or 'no'} image members "
                        f"(its members: {', '.join(sorted(sample))})", where=f"{path}:{key}",
                        fix=f"give every sample one image member ({', '.join(sorted(_IMAGE_EXTENSIONS))})")
    member = sample[images[0]]
    index.shards.append(shard)
    index.offsets.append(member.offset_data)
    index.sizes.append(member.size)
    index.members.append(member.name)
    index.labels.append(_read_label(archive, path, sample["cls"]) if "cls" in sample else None)
    index.masks.append(sample.get(_MASK_EXTENSION))
    return 1


def _read_label(archive: tarfile.TarFile, path: str, member: tarfile.TarInfo) -> int:
    text = archive.extractfile(member).read().decode("utf-8", "replace").strip()
    if not _LABEL.fullmatch(text):
        raise DataError(f"The label member of the shard {path!r} holds {text[:20]!r}, not a class index",
                        where=f"{path}:{member.name}", fix="write each .cls member as a non-negative integer")
    return int(text)


def _all_or_none(index: _Index, paths: list[str], present: list[bool], member: str) -> bool:
    """Whether every sample has the ``member`` (True) or none does (False); DataError naming the first sample
    without it when only some do."""
    missing = [i for i, has in enumerate(present) if not has]
    if len(missing) in (0, len(present)):
        return bool(present) and not missing
    first = f"{paths[index.shards[missing[0]]]}:{index.members[missing[0]]}"
    raise DataError(f"{len(missing)} of {len(present)} samples have no {member} member, the first {first!r}",
                    where=first, fix=f"give every sample a {member} member, or none of them")
