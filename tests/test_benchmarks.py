"""The benchmark scripts' ``--quick`` modes run and print complete tables.

Timing targets are judged by the scripts themselves (benchmarks/README.md), never here: these tests
only keep the scripts working and check the figures that do not depend on the machine. Each script runs
in this test process (imported as a module, its ``main`` called with ``--quick``, its standard output
captured), which spares an interpreter start and the imports per script; conversion.py still starts the
fresh processes it measures memory in.
"""

from __future__ import annotations

import json

import pytest
import torch
import torchvision

from benchmark_scripts import load_script
from orbify import parse_group
from orbify.experiments.digits import load_digit_splits
from orbify.tuning.teacher import VIEW_COMBINATIONS

pytestmark = pytest.mark.slow


def rows(output: str, first_cell: str) -> list[list[str]]:
    """Cells of every Markdown table row in ``output`` whose first cell is ``first_cell``."""
    found = []
    for line in output.splitlines():
        cells = [cell.strip() for cell in line.strip().strip("|").split("|")]
        if line.lstrip().startswith("|") and cells[0] == first_cell:
            found.append(cells)
    return found


def leading_number(cell: str) -> float:
    """The median at the start of a cell such as '12.3 (11.0–14.1) met'."""
    return float(cell.split()[0].replace(",", ""))


def test_checkpoint_size_quick_and_the_header(run_quick):
    output = run_quick("checkpoint_size.py")
    assert rows(output, "torch threads")[0][1].startswith("1 ")   # pinned by run_quick
    assert int(rows(output, "cores (nproc)")[0][1]) >= 1
    assert rows(output, "torch")[0][1] == torch.__version__
    (row,) = rows(output, "resnet18")
    _, group, original_params, converted_params, original_mb, file_mb, ratio, baked_mb = row
    assert group == "d4"
    # Published: torchvision's weights metadata num_params (ResNet18_Weights.DEFAULT, read without a download)
    published = torchvision.models.get_model_weights("resnet18").DEFAULT.meta["num_params"]
    assert original_params == f"{published:,}"
    # float32 storage: 4 bytes per parameter plus the batch-norm buffers (common practice: torch.save of a state dict)
    assert 4 * published / 1e6 < float(original_mb) < 4 * published / 1e6 + 0.5
    # the channels budget stores about 1/|G| of the numbers (|G| = 8 for d4); the file adds a JSON plan
    assert 1 / 8 <= float(ratio) < 1 / 8 + 0.02
    assert float(ratio) == pytest.approx(float(file_mb) / float(original_mb), abs=2e-3)
    # baking expands every weight again: same width as the original, so the same number of values
    assert float(baked_mb) == pytest.approx(float(original_mb), rel=0.01)
    assert int(converted_params.replace(",", "")) < int(original_params.replace(",", "")) / 7


def test_inference_quick(run_quick):
    output = run_quick("inference.py")
    variants = {row[2]: row for row in rows(output, "resnet18") if len(row) == 5}
    for batch in ("1", "4"):
        for label in ("original", "d4 converted, tying cached", "d4 converted, baked",
                      "original averaged over d4, views in one batch",
                      "original averaged over d4, one forward per view"):
            row = next(r for r in rows(output, "resnet18") if len(r) == 5 and r[1] == batch and r[2] == label)
            assert leading_number(row[3]) > 0 and leading_number(row[4]) > 0
    assert any(label.startswith("d4 expanding all tied weights") for label in variants)
    ratio_rows = [row for row in rows(output, "resnet18") if len(row) == 8]
    assert len(ratio_rows) == 4   # batches 1 and 4, wall and CPU
    for row in ratio_rows:
        assert row[2].startswith("d4")
        for cell in row[3:7]:
            assert leading_number(cell) > 0
            assert cell.endswith(" met") or cell.endswith(" NOT met")
        assert leading_number(row[7]) > 0


def test_training_step_quick(run_quick):
    output = run_quick("training_step.py")
    labels = {row[1] for row in rows(output, "resnet18") if len(row) == 4}
    assert labels == {"original", "d4 tied", "d4 baked", "d4 expansion alone (forward + backward)"}
    ratio_rows = [row for row in rows(output, "resnet18") if len(row) == 5]
    assert len(ratio_rows) == 2   # wall and CPU
    for row in ratio_rows:
        assert all(leading_number(cell) > 0 for cell in row[2:])


def test_conversion_quick(run_quick):
    table = {row[1]: row for row in rows(run_quick("conversion.py"), "resnet18")}
    assert set(table) == {"on", "off"}
    for row in table.values():
        wall, cpu, peak, rise, before = (leading_number(cell) for cell in row[2:])
        assert wall > 0 and cpu > 0
        assert before > 0 and rise >= 0
        assert peak == pytest.approx(rise + before, abs=2)


def test_finer_rotations_quick(run_quick):
    output = run_quick("finer_rotations.py")
    variants = {row[1] for row in rows(output, "resnet18, random weights")}
    assert {"plain", "c8 harmonic", "c8 bilinear"} <= variants
    converted = [row for row in rows(output, "resnet18, random weights") if row[1].startswith("c8") and len(row) == 6]
    assert len(converted) == 4   # harmonic and bilinear, smooth fields and photographs
    assert all(float(row[5]) <= 1e-5 for row in converted)   # quarter turns stay exact inside c8 (float64)
    paired = [row for row in rows(output, "resnet18, random weights") if row[2].endswith(" of 4")]
    assert len(paired) == 2   # one paired count per kind of input, out of the 4 quick inputs


def test_calibrated_digits_quick(run_quick):
    output = run_quick("calibrated_digits.py")
    default = rows(output, "calibrated (the defaults)")
    assert len(default) == 2   # c4 and d4, before tuning
    budget_rows = [row for row in rows(output, "calibrated") if len(row) == 4]   # start, lr, before, one budget
    assert len(budget_rows) == 2   # c4 and d4 at the one quick learning rate
    assert all(-100 <= float(cell) <= 100 for row in budget_rows for cell in row[2:])   # points from TTA
    assert "smallest budget" in output


def test_streaming_quick(run_quick):
    output = run_quick("streaming.py")
    cache = {row[0]: row for row in rows(output, "first") + rows(output, "second")}
    assert leading_number(cache["first"][1]) > 0 and "reused: True" in cache["second"][2]
    speeds = [leading_number(row[1]) for name in ("plain PyTorch fine-tuning of the original",
                                                  "orbify tune, cached teacher (cache reused)",
                                                  "orbify tune, online teacher, light augmentation")
              for row in rows(output, name)]
    assert len(speeds) == 3 and all(rate > 0 for rate in speeds)
    assert "online costs" in output and "expected" in output


def test_digits_experiment_quick(run_quick, tmp_path):
    output = run_quick("digits_experiment.py", "--json", str(tmp_path / "rows.json"))
    table = json.loads((tmp_path / "rows.json").read_text())
    one_image = 1 / len(load_digit_splits(seed=0).test_labels)   # the script's own split of the test set
    tuned = [f"converted, tuned ({teacher})" for teacher in ("most-confident teacher, no labels",
                                                             "most-confident teacher + labels",
                                                             "probability-average teacher, no labels")]
    for name in ("c4", "d4"):
        group = parse_group(name)
        mine = {row["model"]: row for row in table if row["group"] == name}
        assert set(mine) == {"original", *(f"original + TTA ({views})" for views in VIEW_COMBINATIONS),
                             "converted, before tuning", *tuned}
        original = mine["original"]
        # the original saw upright digits only, so turning them costs it accuracy: what the experiment is about
        assert original["upright"] > original["accuracy_every_element"] + 0.1, original
        for model, row in mine.items():
            assert 0 <= row["worst_element"] <= row["accuracy_every_element"] <= 1, row
            assert row["wall_ms_per_image"] > 0 and row["cpu_ms_per_image"] > 0
            if model == "original":
                continue
            # averaged over the group or converted: invariant, so every element is classified alike (a float32
            # near-tie may flip one image)
            assert row["accuracy_every_element"] - row["worst_element"] <= one_image, row
            assert abs(row["upright"] - row["accuracy_every_element"]) <= one_image, row
            if model.startswith("original + TTA"):     # |G| views of every image in one batch
                assert row["forwards"] == group.order
                assert row["macs_per_image"] == group.order * original["macs_per_image"]
            else:                                      # channels budget: the original's widths, one forward
                assert row["forwards"] == 1
                assert row["macs_per_image"] == pytest.approx(original["macs_per_image"], rel=0.05)
        # tuning moves the converted model well away from its start (a tuning step that does nothing would not)
        start = mine["converted, before tuning"]["accuracy_every_element"]
        assert mine[tuned[0]]["accuracy_every_element"] > start + 0.2, (start, mine[tuned[0]])
        assert f"### {name}: rotated test set ({len(mine)} models)" in output
        assert "against best TTA" in output


def test_coverage_quick(run_quick, tmp_path):
    timm = pytest.importorskip("timm")
    page_path = tmp_path / "coverage.md"
    output = run_quick("coverage.py", "--out", str(page_path))
    page = page_path.read_text()
    assert page.strip() == output.strip()                   # the page is what the script prints
    published = {name: torchvision.models.get_model_weights(name).DEFAULT.meta["num_params"]   # read, not downloaded
                 for name in ("shufflenet_v2_x0_5", "lraspp_mobilenet_v3_large")}
    for name, kind in (("shufflenet_v2_x0_5", "classification"), ("lraspp_mobilenet_v3_large", "segmentation")):
        table = {row[3]: row for row in rows(page, name)}
        assert set(table) == {"c4", "d4"}, table
        for group, row in table.items():
            _, source, row_set, _, size, before, after, error, convert_s, row_s, result = row
            assert (source, row_set, result) == ("torchvision", kind, "exact"), row
            assert size.startswith("33 ")                    # safe: 33 → 17 → 9 → 5 → 3 at stride 2
            assert int(before.replace(",", "")) == published[name]   # torchvision's weights metadata num_params
            order = parse_group(group).order                # the channels budget stores about 1/|G| of the numbers
            assert 1 / order <= int(after.replace(",", "")) / published[name] < 1 / order + 0.02, row
            assert float(error) <= 1e-5 and 0 < float(convert_s) <= float(row_s)
    # timm's resnet10t: a 3×3 stride-2 conv beside a 2×2 stride-2 average pool in the shortcut, exact on sides of
    # opposite parity (docs/design.md §6): no size is exact, so the table converts it with --repair-strides, which
    # replaces one op of each of its 3 conflicting pairs (one per strided stage after the stem)
    for row in rows(page, "resnet10t"):
        assert row[1:3] == ["timm", "CNN"] and float(row[7]) <= 1e-5, row
        assert row[10].startswith("exact: after --repair-strides (3 ops replaced; relative output change"), row
        # the parameter count of timm's own model definition
        assert int(row[5].replace(",", "")) == sum(p.numel() for p in timm.create_model("resnet10t").parameters())
    summary = {(row[1], row[2]): row[3:] for row in rows(page, "torchvision") + rows(page, "timm") if len(row) == 8}
    assert summary[("classification", "c4")] == summary[("segmentation", "d4")] == ["1", "1", "0", "0", "0"]
    assert summary[("CNN", "d4")] == ["1", "1", "0", "0", "0"]
    assert "timm CNN families converted exactly under c4 and d4: 1 of 1 (100 %)" in page
    assert "Exact rows after --repair-strides (every source and set): 2." in page
    # left out: the family of every timm name whose first word is 'vit' (timm's own registry lookup)
    assert rows(page, "vit")[0][1:] == [str(len(timm.list_models("vit_*"))), "transformer: Attention"]
    with pytest.raises(SystemExit, match="already exists"):   # refused before any work without --force
        run_quick("coverage.py", "--out", str(page_path))
    assert page_path.read_text() == page


def test_coverage_rows_of_killed_and_refused_models(run_quick, tmp_path):
    from orbify.errors import UnsupportedOpError

    # every process is killed at its deadline, and a row it sends after the deadline does not count (the quick
    # models' c4 rows take about 0.6 s, under the 1 s the parent waits for messages at most)
    output = run_quick("coverage.py", "--out", str(tmp_path / "coverage.md"), "--timeout", "0.01", "--groups", "c4")
    results = [row[10] for name in ("shufflenet_v2_x0_5", "lraspp_mobilenet_v3_large", "resnet10t")
               for row in rows(output, name)]
    assert results == ["failed: timed out after 0.01 s (--timeout)"] * 3
    coverage = load_script("coverage")
    error = UnsupportedOpError("Cutting channels 0:12 of a orbit(4) value. It splits an orbit",
                               where='graph node \'getitem\' at File "/venv/lib/site-packages/timm/models/x.py", line 7',
                               fix="use widths divisible by 4")
    assert coverage.refusal(error) == ("Cutting channels 0:12 of a orbit(4) value. Where: graph node 'getitem' at "
                                       'File "timm/models/x.py", line 7')
    assert [coverage.timm_family(name) for name in ("resnet50d", "mobilenetv3_large_100", "cs3darknet_s",
                                                    "tf_efficientnet_b0", "res2net50_14w_8s", "inception_v3")] == \
        ["resnet", "mobilenetv3", "cs3darknet", "tf_efficientnet", "res2net", "inception_v3"]
