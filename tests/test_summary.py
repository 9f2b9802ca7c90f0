"""Model summaries (per-layer params, MACs, layouts) and their diff; the summary and diff commands."""

import json

import pytest
import torch
import torchvision
from torch import nn
from torch.utils.flop_counter import FlopCounterMode
from typer.testing import CliRunner

from helpers import example_params
from orbify.cli import app
from orbify.conversion.converter import convert
from orbify.errors import GroupError
from orbify.verification.report import diff_markdown, summary_markdown
from orbify.verification.summary import diff_summaries, summarize

runner = CliRunner()

# Source: torchvision's published figures, in the metadata of each architecture's default weights
# (torchvision.models.get_model_weights(name).DEFAULT.meta, read without a download): "num_params", and "_ops",
# the GFLOPS column of torchvision's model table, which counts multiply-adds at 224×224, to three decimals.
PUBLISHED_ROUNDING_GMACS = 0.0005   # half a unit of the third decimal


def flop_counter_macs(model, x) -> int:
    """Multiply-adds of one forward pass by torch.utils.flop_counter.FlopCounterMode (2 FLOPs each)."""
    with torch.no_grad(), FlopCounterMode(display=False) as counter:
        model(x)
    return counter.get_total_flops() // 2


@pytest.mark.parametrize("name", ["mobilenet_v2", "resnet18"])
def test_summary_totals_match_published_figures_and_the_flop_counter(name):
    published = torchvision.models.get_model_weights(name).DEFAULT.meta
    # shapes are all a count needs: the model and its input live on the meta device, no arithmetic is done
    model = torchvision.models.get_model(name, weights=None).eval().to("meta")
    x = torch.zeros(1, 3, 224, 224, device="meta")
    summary = summarize(model, x, title=name)
    assert summary.params == published["num_params"]
    assert abs(summary.macs / 1e9 - published["_ops"]) <= PUBLISHED_ROUNDING_GMACS
    assert summary.macs == flop_counter_macs(model, x)
    # every multiply-add of these networks happens in a conv or linear layer, and each is listed once
    assert sum(row.macs for row in summary.rows) == summary.macs
    assert summary.rows[0].name == summary.rows[0].target.replace(".", "_")


def test_rows_of_a_plain_model_follow_the_standard_formulas():
    # Common practice (no source): a conv makes C_out·H_out·W_out·(C_in/groups)·kh·kw multiply-adds and
    # stores C_out·(C_in/groups)·kh·kw weights (+ C_out bias); a linear layer in·out (+ out).
    model = nn.Sequential(nn.Conv2d(3, 8, 3, stride=2, padding=1), nn.BatchNorm2d(8), nn.ReLU(),
                          nn.Conv2d(8, 8, 3, padding=1, groups=4, bias=False), nn.Flatten(), nn.Linear(8 * 5 * 5, 4))
    summary = summarize(model, torch.zeros(1, 3, 9, 9))
    conv, norm, grouped, linear = summary.rows
    assert (conv.name, conv.op, conv.channels, conv.kernel, conv.stride) == ("_0", "Conv2d", "3→8", "3×3", "2×2")
    assert conv.macs == 8 * 5 * 5 * 3 * 3 * 3 and conv.params == 8 * 3 * 3 * 3 + 8 and conv.output_shape == "8×5×5"
    assert norm.op == "BatchNorm2d" and norm.params == 16 and norm.macs == 0 and norm.kernel == "-"
    assert grouped.macs == 8 * 5 * 5 * 2 * 3 * 3 and grouped.params == 8 * 2 * 3 * 3
    assert linear.channels == "200→4" and linear.macs == 200 * 4 and linear.params == 200 * 4 + 4
    assert all(row.layout_in == row.layout_out == "-" for row in summary.rows)


def test_converted_summary_carries_the_plan_layouts_and_stored_params():
    torch.manual_seed(0)
    model = nn.Sequential(nn.Conv2d(3, 16, 3, padding=1), nn.BatchNorm2d(16), nn.ReLU(),
                          nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(16, 3)).eval()
    x = torch.zeros(1, 3, 9, 9)
    converted, plan = convert(model, "c4", example_input=x)
    summary = summarize(converted, x, plan, title="c4")
    rows = {row.name: row for row in summary.rows}
    for layer in plan.layers:
        assert (rows[layer.name].layout_in, rows[layer.name].layout_out) == \
            (str(layer.layout_in), str(layer.layout_out))
    assert rows["_0"].op == "Conv2d" and rows["_0"].params == 4 * 3 * 3 * 3 + 4   # 4 base filters + 4 biases
    assert rows["_1"].op == "OrbitBatchNorm"
    # From the shapes (docs/design.md §7, channels budget): 16 channels in 4 orbits of 4; the conv stores 4 base
    # filters and 4 biases, the batch norm a weight and a bias per orbit, the invariant head a weight per input
    # orbit and class and 3 biases. The widths stay, so the multiply-adds are the plain conv's and linear's.
    assert summary.params == (4 * 3 * 3 * 3 + 4) + 2 * 4 + (4 * 3 + 3)
    assert summary.macs == 16 * 9 * 9 * 3 * 3 * 3 + 16 * 3
    assert (summary.group, summary.budget) == ("c4", "channels")


def test_diff_of_resnet18_before_and_after_c4_channels():
    # Architecture: torchvision's resnet18. Under the 'channels' budget every width stays, so MACs are the same
    # and the stored parameters shrink by |G| = 4 (docs/design.md §7), up to the plain 1000-way head.
    # Neither ratio depends on the input size; 64 pixels keep the test quick.
    torch.manual_seed(0)
    model = torchvision.models.resnet18().eval()
    x = torch.zeros(1, 3, 64, 64)
    before = summarize(model, x, title="resnet18")
    converted, plan = convert(model, "c4", example_input=x)
    after = summarize(converted, x, plan, title="resnet18 c4")
    diff = diff_summaries(before, after)
    assert diff.param_ratio == pytest.approx(1 / 4, rel=0.01)
    assert diff.mac_ratio == pytest.approx(1.0, abs=1e-3)
    assert [row.status for row in diff.rows] == ["changed"] * len(before.rows)
    conv1 = diff.rows[0]
    assert conv1.name == "conv1" and set(conv1.changed) == {"layout_in", "layout_out", "params"}
    text = diff_markdown(diff)
    assert "**9,408 → 2,352**" in text    # conv1: 64·3·7·7 weights, a quarter stored and "(÷4.00)" in text


def test_diff_aligns_by_node_name_and_marks_rows_in_one_model_only():
    a = nn.Sequential(nn.Conv2d(3, 4, 3), nn.ReLU(), nn.Conv2d(4, 4, 3))
    b = nn.Sequential(nn.Conv2d(3, 4, 3), nn.BatchNorm2d(4), nn.Conv2d(4, 6, 3))
    x = torch.zeros(1, 3, 9, 9)
    diff = diff_summaries(summarize(a, x), summarize(b, x))
    assert [(row.name, row.status) for row in diff.rows] == [("_0", "same"), ("_1", "only in B"), ("_2", "changed")]
    assert set(diff.rows[2].changed) == {"channels", "params", "macs", "output_shape"}
    numbers = [sum(parameter.numel() for parameter in model.parameters()) for model in (a, b)]
    assert diff.param_ratio == pytest.approx(numbers[1] / numbers[0])


def test_untraceable_models_are_listed_by_module_path():
    class Branching(nn.Module):
        def __init__(self):
            super().__init__()
            self.stem = nn.Conv2d(3, 4, 3)

        def forward(self, x):
            return self.stem(x) if x.sum() > 0 else -self.stem(x)   # data-dependent: torch.fx cannot trace it

    summary = summarize(Branching(), torch.ones(1, 3, 8, 8))
    assert [row.name for row in summary.rows] == ["stem"]
    assert "stem" in summary_markdown(summary)


def test_cli_summary_and_diff(tmp_path):
    plain = runner.invoke(app, ["summary", "example"])
    assert plain.exit_code == 0, plain.output
    assert "features_0_0" in plain.output and f"{example_params():,}" in plain.output
    out = tmp_path / "diff.json"
    result = runner.invoke(app, ["diff", "example", "example", "--group-b", "c4", "--json", str(out),
                                 "--markdown", str(tmp_path / "diff.md")])
    assert result.exit_code == 0, result.output
    data = json.loads(out.read_text())
    assert data["b"]["group"] == "c4" and data["a"]["group"] is None
    # the counts from the layer shapes and the budget formula (tests/helpers.py)
    assert data["param_ratio"] == pytest.approx(example_params(group_order=4) / example_params())
    assert data["mac_ratio"] == 1.0
    assert "(÷4.00)" in (tmp_path / "diff.md").read_text()
    groups = runner.invoke(app, ["diff", "example", "example", "--group-a", "c4", "--group-b", "d4",
                                 "--json", str(tmp_path / "groups.json")])
    assert groups.exit_code == 0, groups.output
    first = json.loads((tmp_path / "groups.json").read_text())["rows"][0]
    # the first conv has 16 channels: 4 orbits of 4 under c4, 2 orbits of 8 under d4
    assert (first["a"]["layout_out"], first["b"]["layout_out"]) == ("orbit(4)", "orbit(2)")
    assert "layout_out" in first["changed"]
    again = runner.invoke(app, ["diff", "example", "example", "--json", str(out)])
    assert again.exit_code == 2 and "already exists" in again.output


def test_cli_summary_bad_group_fails_cleanly():
    result = runner.invoke(app, ["summary", "example", "--group", "x4"])
    assert result.exit_code == GroupError.exit_code
    assert "Unknown group 'x4'" in result.output and "Traceback" not in result.output
