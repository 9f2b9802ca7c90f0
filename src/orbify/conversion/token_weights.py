"""The record of the model tensors tied while converting (per-channel scales, class tokens, position embeddings),
and how exact a position embedding resampled to the input's patch grid stays.

Carrying the original's weights into tied attention modules and token tensors is :mod:`orbify.transfer.attention`.
"""

from __future__ import annotations

from dataclasses import replace

import torch

from orbify.graph.rules import Step
from orbify.graph.tokens import TokenParameter
from orbify.symmetry.groups import Group
from orbify.symmetry.layouts import Layout
from orbify.symmetry.tying import relative_residual


@torch.no_grad()
def resampling_note(parameter: TokenParameter, tensor: torch.Tensor, group: Group) -> str:
    """The plan's note on a tied position embedding that the model resamples to its input's patch grid.

    Resampling commutes with the grid's quarter turns and mirrors only as far as its sampling does: bicubic and
    bilinear interpolation of a square grid do in exact arithmetic, nearest does not, and every one rounds. The
    note gives the invariance error of the tied ``tensor`` resampled (by the model's own call) to grids around
    its own, ``max_g ‖g·R(t) − R(t)‖ / ‖R(t)‖``: exact at the converted grid, approximate elsewhere.
    """
    node, layout = parameter.resampling, parameter.layout
    kwargs = dict(zip(("posemb", "new_size", "old_size", "num_prefix_tokens"), node.args), **node.kwargs)
    kwargs.pop("posemb", None)
    side = layout.height
    sides = sorted({max(1, side // 2), max(1, side - 1), side + 1, side + side // 2, 2 * side} - {side})
    worst = 0.0
    for other in sides:
        moved = replace(layout, height=other, width=other)
        resampled = node.target(tensor, **{**kwargs, "new_size": (other, other)})
        permutation = moved.entry_permutation(group, tuple(resampled.shape))
        flat = resampled.reshape(-1)
        worst = max(worst, max(relative_residual(flat, flat[row]) for row in permutation))
    mode = kwargs.get("interpolation", "bicubic")
    return (f"'{parameter.attribute.target}' is resampled to the input's patch grid ({node.target.__name__}, {mode}): "
            f"exact at the converted {side}×{side} grid; resampled to other grids it is invariant only to within "
            f"{worst:.1e} (measured at sides {', '.join(map(str, sides))}), so there the model is approximately "
            "invariant (orbify check --input-size measures it)")


class TiedTensors:
    """The model tensors tied so far (per-channel scales, class tokens, position embeddings), each with the layout of
    the values it meets, listed in the plan's ``notes`` (one note per kind)."""

    def __init__(self, notes: list[str]):
        self.notes = notes
        self.layouts: dict[str, Layout] = {}
        self.kinds: dict[str, str] = {}
        self.note_at: dict[str, int] = {}

    def seen(self, step: Step, target: str, layout: Layout) -> bool:
        """True when ``target`` is tied already, for values of ``layout`` (values of another layout are refused)."""
        if target not in self.layouts:
            return False
        if self.layouts[target] != layout:
            raise step.refuse(f"The tensor '{target}' is used on values of different layouts "
                              f"({self.layouts[target]} and {layout})",
                              "use one tensor per value it meets, or convert only up to the node before it")
        return True

    def add(self, kind: str, target: str, layout: Layout) -> None:
        """Record ``target`` (tied for values of ``layout``) in the note on tensors of ``kind``."""
        self.layouts[target], self.kinds[target] = layout, kind
        if kind not in self.note_at:
            self.note_at[kind] = len(self.notes)
            self.notes.append("")
        names = [name for name, its in self.kinds.items() if its == kind]
        self.notes[self.note_at[kind]] = f"{kind}: {', '.join(names)}"
