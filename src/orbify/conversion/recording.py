"""Writing a converted layer into the conversion plan."""

from __future__ import annotations

from torch import fx, nn

from orbify.conversion.layer_builder import TiedLayer, channels_of
from orbify.conversion.state import ConversionState
from orbify.graph.plan import LayerPlan, Rounding
from orbify.symmetry.layouts import Layout


def record_layer(state: ConversionState, node: fx.Node, layer: TiedLayer, residual: float | None,
                 identity_residual: float | None) -> None:
    """Record a converted conv / linear with its weight residuals (as loaded, with the identity assignment)."""
    _record(state, node, layer.old, layer.new, lin=layer.lin, lout=layer.lout, notes=layer.notes, residual=residual,
            identity_residual=identity_residual, groups=(getattr(layer.old, "groups", 1), layer.groups))


def record_norm(state: ConversionState, node: fx.Node, old: nn.Module, new: nn.Module, layout: Layout) -> None:
    """Record a converted norm layer (its layout passes through)."""
    _record(state, node, old, new, lin=layout, lout=layout, notes=[], residual=None, identity_residual=None,
            groups=(1, 1))


def _record(state: ConversionState, node: fx.Node, old: nn.Module, new: nn.Module, *, lin: Layout, lout: Layout,
            notes: list[str], residual: float | None, identity_residual: float | None,
            groups: tuple[int, int]) -> None:
    """Append the layer's entry; a width the budget rounded to whole orbits gets a note."""
    before, after = channels_of(old), channels_of(new)
    rounding = Rounding.of(state.budget, lout, before[1], after[1])
    if rounding is not None:
        notes.append(rounding.note)
    state.plan.layers.append(LayerPlan(
        name=node.name, target=str(node.target), op=type(old).__name__, layout_in=lin, layout_out=lout,
        channels_before=before, channels_after=after, kernel=tuple(getattr(old, "kernel_size", ())),
        stride=tuple(getattr(old, "stride", ())), groups=groups, notes=notes, weight_residual=residual,
        weight_residual_identity=identity_residual, rounding=rounding))
