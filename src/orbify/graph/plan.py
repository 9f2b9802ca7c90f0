"""The conversion plan: options, budgets and the per-layer record a conversion leaves behind."""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

from orbify.errors import OptionError
from orbify.symmetry.groups import Group

BUDGETS = ("channels", "params", "fields")
HEADS = ("invariant", "map")
INITS = ("orbit-average", "embed", "calibrated")


def orbits_for(channels: int, group: Group, budget: str) -> int:
    """Orbits a layer of ``channels`` original channels gets under ``budget`` (design.md section 7).

    ``channels``: C/|G| (same width, ÷|G| params); ``params``: C/√|G| (≈ same params);
    ``fields``: C (×|G| width, lossless embedding). Rounded to whole orbits, never below one.
    """
    n = group.order
    exact = {"channels": channels / n, "params": channels / math.sqrt(n), "fields": float(channels)}[budget]
    return max(1, int(math.floor(exact + 0.5)))


@dataclass
class LayerPlan:
    """What the conversion did to one layer (a conv, linear, norm or inserted orbit pool)."""

    name: str                 # graph node name
    target: str               # module path in the model
    op: str                   # module class name of the original
    layout_in: str
    layout_out: str
    channels_before: tuple[int, int]
    channels_after: tuple[int, int]
    kernel: tuple[int, ...] = ()
    stride: tuple[int, ...] = ()
    groups: tuple[int, int] = (1, 1)   # before, after
    notes: list[str] = field(default_factory=list)
    weight_residual: float | None = None
    weight_residual_identity: float | None = None

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict) -> "LayerPlan":
        data = dict(data)
        for key in ("channels_before", "channels_after", "kernel", "stride", "groups"):
            data[key] = tuple(data[key])
        return cls(**data)


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
    layers: list[LayerPlan] = field(default_factory=list)
    values: dict[str, str] = field(default_factory=dict)   # node name → layout
    notes: list[str] = field(default_factory=list)
    calibration: dict | None = None   # the CalibrationReport of a "calibrated" conversion, as a dict

    def layer(self, name: str) -> LayerPlan:
        for layer in self.layers:
            if layer.name == name or layer.target == name:
                return layer
        raise KeyError(name)

    @property
    def roundings(self) -> list[str]:
        return [note for layer in self.layers for note in layer.notes if note.startswith("rounded")]

    def to_dict(self) -> dict:
        data = asdict(self)
        data["layers"] = [layer.to_dict() for layer in self.layers]
        return data

    @classmethod
    def from_dict(cls, data: dict) -> "ConversionPlan":
        data = dict(data)
        data["layers"] = [LayerPlan.from_dict(layer) for layer in data.get("layers", [])]
        data["input_shape"] = tuple(data["input_shape"])
        return cls(**data)
