"""What a calibrated conversion did: per-layer refits, reconstruction errors, agreement with the original."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

from rich.table import Table

LEAST_SQUARES = "least squares"
ORBIT_AVERAGE = "orbit average"


@dataclass
class LayerCalibration:
    """One conv or linear layer.

    ``method``: "least squares" (refitted) or "orbit average" (the fallback, ``note`` says why).
    ``rows``: fitted base rows (orbits for orbit outputs, channels for plain ones); ``channels``:
    the original output channel each row reproduces (slot 0 of an orbit); ``features``:
    base features per row; ``views``: copies of each image fitted. ``error``: the share of the
    targets' variance the refit leaves unexplained on the calibration images (0 = exact, 1 = no
    better than a constant).
    """

    name: str
    target: str
    method: str
    rows: int
    features: int
    views: int
    channels: list[int] = field(default_factory=list)
    error: float | None = None
    note: str | None = None


@dataclass
class CalibrationReport:
    """A calibration run.

    ``agreement``: share of the calibration images (pixels, for dense outputs) on which the
    calibrated model's top class equals that of the original's output averaged over the group
    (None for outputs that are not class scores). ``recomputed``: batch passes that restarted
    from the images because the kept values would have exceeded the memory budget.
    """

    images: int
    views: int
    selection: str
    ridge: float
    transformed_copies: bool
    refit_norms: bool
    layers: list[LayerCalibration] = field(default_factory=list)
    agreement: float | None = None
    seconds: float = 0.0
    recomputed: int = 0
    notes: list[str] = field(default_factory=list)

    @property
    def fallbacks(self) -> list[LayerCalibration]:
        return [layer for layer in self.layers if layer.method != LEAST_SQUARES]

    def summary(self) -> str:
        """One line: images, views, layers refitted, agreement and time."""
        refit = len(self.layers) - len(self.fallbacks)
        agreement = "n/a" if self.agreement is None else f"{self.agreement:.3f}"
        return (f"calibrated on {self.images} images × {self.views} views: {refit}/{len(self.layers)} layers refitted "
                f"by least squares, top-1 agreement with the original averaged over the group {agreement} "
                f"({self.seconds:.1f} s)")

    def table(self) -> Table:
        """The per-layer record as a rich table."""
        table = Table("layer", "method", "rows", "features", "views", "unexplained variance", "note")
        for layer in self.layers:
            error = "" if layer.error is None else f"{layer.error:.4f}"
            table.add_row(layer.target, layer.method, str(layer.rows), str(layer.features), str(layer.views), error,
                          layer.note or "")
        return table

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict) -> "CalibrationReport":
        """The report from its :meth:`to_dict` form."""
        data = dict(data)
        data["layers"] = [LayerCalibration(**layer) for layer in data.get("layers", [])]
        return cls(**data)
