"""Whole-model conversion: trace, infer layouts, rewrite with tied modules (docs/design.md §1, §5–§8).

``convert(model, group, budget, head, example_input)`` traces a copy of ``model``, walks the graph
once in order applying the op rules of :mod:`orbify.graph.rules` (:mod:`orbify.conversion.walk`),
replaces every conv / linear / norm by its tied counterpart (:mod:`orbify.conversion.layer_converter`)
with the pretrained weights carried over (:mod:`orbify.conversion.weight_loading`: orbit averaging
with channel matching, or the lossless embedding), and returns the converted ``GraphModule`` with a
:class:`~orbify.graph.plan.ConversionPlan`. The original model is untouched.
"""

from __future__ import annotations

from collections.abc import Iterable

import torch
from torch import fx, nn

from orbify.calibration.calibrate import calibrate_conversion
from orbify.common.options import check_choice
from orbify.conversion.graph_edits import descendants, find_node, head_layers, insert_pool
from orbify.conversion.layer_converter import LayerConverter
from orbify.conversion.state import ConversionState
from orbify.conversion.walk import GraphWalk
from orbify.errors import InputShapeError, OptionError
from orbify.graph.channel_order import shuffle_orbits
from orbify.graph.invariant_parts import separate_single_channel_parts
from orbify.graph.plan import BUDGETS, HEADS, INITS, ConversionPlan
from orbify.graph.stride_repair import repair_for_conversion
from orbify.graph.tracing import trace
from orbify.symmetry.groups import Group, approximate_note, parse_group
from orbify.transfer.recalibrate import recalibrate_batch_norm

#: Images per batch when calibration images come as one tensor.
CALIBRATION_BATCH = 32

#: Channel matching is on unless ``match=False`` (see DEVELOPERS.md, "Weight transfer", for the measurement).
MATCH_DEFAULT = True


def convert(model: nn.Module, group: str | Group = "d4", budget: str = "channels", head: str = "invariant",
            example_input: torch.Tensor | None = None, *, init: str = "orbit-average", match: bool = MATCH_DEFAULT,
            carry_weights: bool = True, calibration: torch.Tensor | Iterable[torch.Tensor] | None = None,
            stop_at: str | None = None, leaf_types: tuple[type, ...] = (),
            progress: bool = False, repair_strides: bool = False) -> tuple[fx.GraphModule, ConversionPlan]:
    """Convert a plain model into its tied counterpart under ``group``.

    Args:
        model: the plain model (left untouched).
        group: "c4", "d4", ... (see :func:`orbify.symmetry.groups.parse_group`).
        budget: "channels" (same width, ÷|G| params), "params" (≈ same params) or "fields"
            (×|G| width, the original embedded losslessly).
        head: "invariant" (the output does not change under the group) or "map" (a dense
            output, such as a mask, that moves with the input).
        example_input: a (B, C, H, W) tensor; shapes are propagated with it.
        init: "orbit-average" (project the pretrained weights), "embed" (``fields`` budget only:
            slot 0 of every orbit copies the original, and the converted model equals the original
            averaged over the group) or "calibrated" (orbit average, then every layer refitted on the
            ``calibration`` images so that the model keeps the original's behaviour averaged over
            the group: :func:`orbify.calibration.calibrate.calibrate_conversion` with its defaults; the report
            goes into ``plan.calibration`` and each layer's notes).
        match: with "orbit-average", choose which original channels share an orbit (and in which
            slot) to minimise the weight residual, layer by layer; False keeps the identity order.
            The plan records each layer's residual with the chosen and with the identity assignment.
        carry_weights: False leaves the new layers at their fresh initialisation (no transfer, no
            matching): the structure only, for loading a saved state dict.
        calibration: unlabeled images, one (N, C, H, W) tensor or batches of them, prepared like the
            original's inputs. With ``init="calibrated"`` (where they are required) every layer is
            refitted on them; otherwise the converted model's batch-norm statistics are re-estimated
            on them. Recorded in the plan either way.
        stop_at: convert only up to this node (name or module path); its orbit is pooled there and
            everything after it stays plain.
        leaf_types: module classes to keep as single graph nodes when tracing.
        progress: show a progress bar per layer while calibrating (rich, on stderr).
        repair_strides: when no input size is exact because ops need sides of opposite parity, replace
            one op of each conflict by its counterpart exact on the other parity
            (:mod:`orbify.graph.stride_repair`); the plan notes each replacement and the drift it causes.

    Returns:
        The converted GraphModule (in the mode of ``model``) and the conversion plan.

    Example:
        A small classifier under the dihedral group d4: its 8 conv channels become one orbit of
        the 8 rotations and mirrors, and a quarter turn of the input leaves the output unchanged.

        >>> import torch
        >>> from torch import nn
        >>> from orbify import convert
        >>> model = nn.Sequential(nn.Conv2d(3, 8, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1),
        ...                       nn.Flatten(), nn.Linear(8, 10)).eval()
        >>> x = torch.randn(2, 3, 9, 9)
        >>> converted, plan = convert(model, "d4", example_input=x[:1])
        >>> [(layer.target, str(layer.layout_out)) for layer in plan.layers]
        [('0', 'orbit(1)'), ('4', 'plain(10)')]
        >>> torch.allclose(converted(torch.rot90(x, 1, dims=(2, 3))), converted(x), atol=1e-5)
        True
    """
    group = parse_group(group)
    _check_options(budget, head, init, carry_weights, calibration, example_input)
    gm = trace(model, example_input, leaf_types)
    plan = ConversionPlan(group.name, budget, head, init, tuple(example_input.shape), stop_at)
    if repair_strides:
        repair_for_conversion(gm, plan, example_input)
        plan.repair_strides = True
    _rewrite(gm, group, plan, match, carry_weights)
    if not group.exact:
        plan.notes.append(approximate_note(group))
    gm.train(model.training)
    if calibration is not None and carry_weights:
        if init == "calibrated":
            plan.calibration = calibrate_conversion(gm, plan, model, calibration, progress=progress)
        else:
            _recalibrate(gm, calibration, plan)
    return gm, plan


def _check_options(budget: str, head: str, init: str, carry_weights: bool, calibration: object,
                   example_input: torch.Tensor | None) -> None:
    check_choice("budget", budget, BUDGETS)
    check_choice("head", head, HEADS)
    check_choice("init", init, INITS)
    if init == "embed" and budget != "fields":
        raise OptionError("The 'embed' initialisation needs the 'fields' budget", where="option init",
                          fix="use budget='fields' with init='embed', or init='orbit-average'")
    if init == "calibrated" and carry_weights and calibration is None:
        raise OptionError("The 'calibrated' initialisation needs calibration images", where="option init",
                          fix="pass calibration= a few hundred unlabeled images (N, C, H, W) prepared like the "
                              "original's inputs (orbify.data.read_images reads a folder or an .npz file), "
                              "or use init='orbit-average'")
    if example_input is None or example_input.dim() != 4:
        got = "none" if example_input is None else f"shape {tuple(example_input.shape)}"
        raise InputShapeError(f"An example input of shape (batch, channels, height, width) is needed, got {got}",
                              fix="pass example_input=torch.randn(1, 3, S, S) at a safe size S (see safe_sizes)")


def _rewrite(gm: fx.GraphModule, group: Group, plan: ConversionPlan, match: bool, carry: bool) -> None:
    """Rewrite the traced ``gm`` in place with tied layers, recording every step in ``plan``.

    With ``plan.stop_at`` an orbit pool goes after that node and everything after it stays plain;
    otherwise the layers that produce the output keep plain outputs.
    """
    separated, notes = separate_single_channel_parts(gm)   # kept plain: invariant single channels
    plan.notes.extend(notes)
    if plan.stop_at is not None:
        pool = insert_pool(gm, find_node(gm, plan.stop_at), "orbit_pool", group.order)
        plain_outputs = descendants(pool) | separated
    else:
        plain_outputs = head_layers(gm) | separated
    shuffles = shuffle_orbits(gm, group.order)
    if shuffles:
        plan.notes.append(f"{shuffles} channel shuffle{'s' if shuffles > 1 else ''} rewritten to shuffle whole orbits "
                          "(the channels keep their original order in the channel maps)")
    plan.match = _matching(plan, match and carry)
    state = ConversionState(gm, group, plan.budget, plan.init, carry, plan.match, plan)
    GraphWalk(state, LayerConverter(state, plain_outputs), plan.head).run()


def _matching(plan: ConversionPlan, asked: bool) -> bool:
    """Whether channel matching applies; a note says why not when it was asked for."""
    if not asked:
        return False
    if plan.init == "embed" or plan.budget == "fields":
        plan.notes.append("channel matching does not apply to the 'fields' budget (every orbit copies "
                          "one original channel); the identity assignment is used")
        return False
    return True


def _recalibrate(gm: fx.GraphModule, batches: torch.Tensor | Iterable[torch.Tensor], plan: ConversionPlan) -> None:
    if isinstance(batches, torch.Tensor):
        batches = batches.split(CALIBRATION_BATCH)
    seen = recalibrate_batch_norm(gm, batches)
    norms = sum(isinstance(m, nn.modules.batchnorm._BatchNorm) for m in gm.modules())
    if norms:
        plan.notes.append(f"batch-norm statistics of {norms} layers re-estimated on {seen} calibration images")
    else:
        plan.notes.append("calibration images given, but the model has no batch norm to recalibrate")
