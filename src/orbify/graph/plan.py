"""The conversion plan: options, budgets and the per-layer record a conversion leaves behind.

The plan's JSON form (:meth:`ConversionPlan.to_dict`, stored in ``.orb`` files) writes every
layout as its printed text (``plain(3)``, ``orbit(16)``, ``flat(orbit(4)×3×3)``), which
:meth:`ConversionPlan.from_dict` reads back into layout objects.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from typing import Protocol

from orbify.symmetry.groups import Group
from orbify.symmetry.layouts import Flat, HeadValues, Layout, Orbit, Permuted, Plain, Tokens, unpermuted

BUDGETS = ("channels", "params", "fields")
HEADS = ("invariant", "map")
INITS = ("orbit-average", "embed", "calibrated")


def orbits_for(channels: int, group: Group, budget: str) -> int:
    """Orbits a layer of ``channels`` original channels gets under ``budget`` (docs/design.md §7).

    ``channels``: C/|G| (same width, ÷|G| params); ``params``: C/√|G| (≈ same params);
    ``fields``: C (×|G| width, lossless embedding). Rounded to whole orbits, never below one.
    """
    n = group.order
    exact = {"channels": channels / n, "params": channels / math.sqrt(n), "fields": float(channels)}[budget]
    return max(1, int(math.floor(exact + 0.5)))


@dataclass(frozen=True)
class Rounding:
    """A layer whose width the ``channels`` budget rounded to whole orbits: ``channels`` became ``orbits`` orbits
    of ``rounded`` channels in all."""

    channels: int
    orbits: int
    rounded: int

    @classmethod
    def of(cls, budget: str, layout_out: Layout, channels_before: int, channels_after: int) -> Rounding | None:
        """The rounding of a layer's output width, None when the budget kept it (or does not aim to)."""
        layout_out = unpermuted(layout_out)
        if budget != "channels" or not isinstance(layout_out, Orbit) or channels_before == channels_after:
            return None
        return cls(channels_before, layout_out.orbits, channels_after)

    @property
    def note(self) -> str:
        """The rounding as the plan's notes and the check report print it."""
        return f"rounded {self.channels} channels to {self.orbits} whole orbits ({self.rounded} channels)"


@dataclass
class LayerPlan:
    """What the conversion did to one layer (a conv, linear, norm or inserted orbit pool).

    ``rounding`` is derived from the other fields (:meth:`Rounding.of`) and is not part of the JSON
    form; its note is among ``notes`` too.
    """

    name: str                 # graph node name
    target: str               # module path in the model
    op: str                   # module class name of the original
    layout_in: Layout
    layout_out: Layout
    channels_before: tuple[int, int]
    channels_after: tuple[int, int]
    kernel: tuple[int, ...] = ()
    stride: tuple[int, ...] = ()
    groups: tuple[int, int] = (1, 1)   # before, after
    notes: list[str] = field(default_factory=list)
    weight_residual: float | None = None
    weight_residual_identity: float | None = None
    rounding: Rounding | None = None

    def to_dict(self) -> dict:
        data = asdict(self)
        data.update(layout_in=_layout_text(self.layout_in), layout_out=_layout_text(self.layout_out))
        del data["rounding"]
        return data

    @classmethod
    def from_dict(cls, data: dict, budget: str) -> LayerPlan:
        """The layer from its JSON form, in a plan of ``budget``."""
        data = dict(data)
        for key in ("channels_before", "channels_after", "kernel", "stride", "groups"):
            data[key] = tuple(data[key])
        for key in ("layout_in", "layout_out"):
            data[key] = _layout_from_text(data[key])
        rounding = Rounding.of(budget, data["layout_out"], data["channels_before"][1], data["channels_after"][1])
        return cls(**data, rounding=rounding)


class CalibrationRecord(Protocol):
    """The report of a calibrated conversion as the plan keeps it: :class:`orbify.calibration.report.CalibrationReport`,
    from a layer above this one, which reads it back with its ``from_dict``."""

    def to_dict(self) -> dict:
        """The JSON form."""


@dataclass
class ConversionPlan:
    """Everything needed to describe (and rebuild) a conversion; JSON-serialisable via ``to_dict``."""

    group: str
    budget: str
    head: str
    init: str
    input_shape: tuple[int, ...]
    stop_at: str | None = None
    match: bool = False
    repair_strides: bool = False   # ops with no exact size replaced before converting (orbify.graph.stride_repair)
    layers: list[LayerPlan] = field(default_factory=list)
    values: dict[str, Layout | None] = field(default_factory=dict)   # node name → layout (None: not a tensor)
    notes: list[str] = field(default_factory=list)
    calibration: CalibrationRecord | None = None   # the report of a "calibrated" conversion

    def layer(self, name: str) -> LayerPlan:
        for layer in self.layers:
            if layer.name == name or layer.target == name:
                return layer
        raise KeyError(name)

    @property
    def roundings(self) -> list[str]:
        """The notes of the layers whose width was rounded to whole orbits, in layer order."""
        return [layer.rounding.note for layer in self.layers if layer.rounding is not None]

    def to_dict(self) -> dict:
        return dict(
            group=self.group, budget=self.budget, head=self.head, init=self.init, input_shape=self.input_shape,
            stop_at=self.stop_at, match=self.match, repair_strides=self.repair_strides,
            layers=[layer.to_dict() for layer in self.layers],
            values={name: _layout_text(layout) for name, layout in self.values.items()}, notes=list(self.notes),
            calibration=None if self.calibration is None else self.calibration.to_dict())

    @classmethod
    def from_dict(cls, data: dict, read_calibration: Callable[[dict], CalibrationRecord]) -> ConversionPlan:
        """The plan from its JSON form; ``read_calibration`` reads the calibration report's form back."""
        data = dict(data)
        data["layers"] = [LayerPlan.from_dict(layer, data["budget"]) for layer in data.get("layers", [])]
        data["input_shape"] = tuple(data["input_shape"])
        data["values"] = {name: _layout_from_text(text) for name, text in data.get("values", {}).items()}
        if data.get("calibration") is not None:
            data["calibration"] = read_calibration(data["calibration"])
        return cls(**data)


_NO_LAYOUT = "-"
"""The JSON form of a value that has no layout (not a tensor)."""


def _layout_text(layout: Layout | None) -> str:
    """The JSON form of a layout: its printed text, ``-`` for none."""
    return _NO_LAYOUT if layout is None else str(layout)


def _layout_from_text(text: str) -> Layout | None:
    """The layout :func:`layout_text` wrote: ``plain(3)``, ``orbit(16)``, ``flat(orbit(16)×7×7)``,
    ``permuted(orbit(16), 0,2,3,1)``, ``tokens(orbit(16), 1+14×14, 0,2,1)``,
    ``heads(orbit(16), 1+14×14, rank 4, tokens 2, channels 3)`` or ``-``."""
    if text == _NO_LAYOUT:
        return None
    match = re.fullmatch(r"(plain|orbit)\((\d+)\)", text)
    if match:
        kind, count = match.group(1), int(match.group(2))
        return Plain(count) if kind == "plain" else Orbit(count)
    match = re.fullmatch(r"flat\((.+)×(\d+)×(\d+)\)", text)
    if match:
        return Flat(_layout_from_text(match.group(1)), int(match.group(2)), int(match.group(3)))
    match = re.fullmatch(r"tokens\((.+), (\d+)\+(\d+)×(\d+), ([\d,]+)\)", text)
    if match:
        dims = tuple(int(d) for d in match.group(5).split(","))
        prefix, height, width = (int(match.group(i)) for i in (2, 3, 4))
        return Tokens(_layout_from_text(match.group(1)), dims, height, width, prefix)
    match = re.fullmatch(r"heads\((.+), (\d+)\+(\d+)×(\d+), rank (\d+), tokens ([\d,]*), channels (\d+|-)\)", text)
    if match:
        prefix, height, width, rank = (int(match.group(i)) for i in (2, 3, 4, 5))
        tokens = tuple(int(axis) for axis in match.group(6).split(",") if axis)
        channels = None if match.group(7) == "-" else int(match.group(7))
        return HeadValues(_layout_from_text(match.group(1)), height, width, prefix, rank, tokens, channels)
    match = re.fullmatch(r"permuted\((.+), ([\d,]+)\)", text)
    if match:
        return Permuted(_layout_from_text(match.group(1)), tuple(int(d) for d in match.group(2).split(",")))
    raise ValueError(f"not a layout: {text!r}")
