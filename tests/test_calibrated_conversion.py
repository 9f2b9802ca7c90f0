"""The calibrated initialisation end to end: the API option, the saved file, the command line and recipes.

The refit itself is tested in tests/test_calibrate.py (against scikit-learn's Ridge). Here the
reference for "keeps the original's behaviour" is the original's logits averaged over the group,
with the group moving the tiles by numpy.rot90 (numpy documentation: rot90 turns counter-clockwise,
from the first axis towards the second), independent of orbify's own group code.
"""

import numpy as np
import pytest
import torch
from typer.testing import CliRunner

from orbify import convert, load, save
from orbify.cli import app
from orbify.errors import OptionError
from orbify.example import load_example_model, make_tiles

TOLERANCE = 1e-5
runner = CliRunner()


@pytest.fixture(scope="module")
def tiles():
    """Example tiles at any angle: 96 to calibrate on (labels unused), 160 fresh ones to compare on."""
    images, _ = make_tiles(256, split="any", size=33, seed=41)
    return images[:96], images[96:]


def rot90_average_top(model, images):
    """Top class of the model's logits averaged over the four quarter turns (numpy.rot90)."""
    with torch.no_grad():
        views = [torch.from_numpy(np.ascontiguousarray(np.rot90(images.numpy(), k, axes=(-2, -1))))
                 for k in range(4)]
        return torch.stack([model(view) for view in views]).mean(0).argmax(1)


def quarter_turn_invariance(model, images):
    with torch.no_grad():
        logits = model(images)
        return max(float((model(torch.rot90(images, k, (-2, -1))) - logits).norm() / logits.norm())
                   for k in (1, 2, 3))


def test_calibrated_conversion_agrees_with_the_averaged_original_better_than_orbit_averaging(tiles):
    calibration, fresh = tiles
    original = load_example_model().eval()
    reference = rot90_average_top(original, fresh)
    averaged, _ = convert(original, "c4", example_input=fresh[:1])
    calibrated, plan = convert(original, "c4", example_input=fresh[:1], init="calibrated", calibration=calibration)
    calibrated.eval()
    with torch.no_grad():
        agreement = {name: float((model.eval()(fresh).argmax(1) == reference).float().mean())
                     for name, model in (("orbit-average", averaged), ("calibrated", calibrated))}
    # Measured on these tiles (96 calibration tiles): orbit average 0.37, calibrated 0.78.
    assert agreement["calibrated"] >= 0.7, agreement
    assert agreement["calibrated"] > agreement["orbit-average"] + 0.3, agreement
    assert quarter_turn_invariance(calibrated, fresh) <= TOLERANCE
    assert plan.init == "calibrated"
    report = plan.calibration
    assert report.images == 96 and report.views == 4
    assert 0.0 <= report.agreement <= 1.0
    layers = {layer.target: layer for layer in report.layers}
    assert set(layers) == {"features.0.0", "features.1.0", "features.2.0", "features.3.0", "classifier"}
    assert all(0.0 <= layer.error <= 1.0 for layer in layers.values())
    assert any(note.startswith("calibrated on 96 images") for note in plan.notes)
    assert plan.layer("classifier").notes[-1].startswith("calibrated: least squares, unexplained variance")


def test_calibrated_model_saves_and_loads_with_its_report(tmp_path, tiles):
    calibration, fresh = tiles
    original = load_example_model().eval()
    converted, plan = convert(original, "d4", example_input=fresh[:1], init="calibrated",
                              calibration=calibration[:32])
    path = save(converted.eval(), plan, tmp_path / "calibrated.orb", reference="orbify.example:load_example_model")
    loaded = load(path)
    with torch.no_grad():
        assert torch.equal(loaded.module(fresh), converted(fresh))
    assert loaded.plan.init == "calibrated" and loaded.plan.calibration == plan.calibration


def test_calibrated_without_images_is_refused():
    with pytest.raises(OptionError, match="needs calibration images"):
        convert(load_example_model(), "c4", example_input=torch.zeros(1, 3, 33, 33), init="calibrated")


# -- the command line -------------------------------------------------------------------------------------------
@pytest.fixture
def tile_file(tmp_path, tiles):
    path = tmp_path / "tiles.npz"
    np.savez(path, images=tiles[0].numpy())
    return path


def invoke(*args):
    result = runner.invoke(app, [str(a) for a in args])
    return result.exit_code, result.output, result.stderr


def test_cli_calibration_implies_the_calibrated_init_and_reports_it(tmp_path, tile_file):
    out = tmp_path / "example-c4.orb"
    code, output, _ = invoke("convert", "example", "--group", "c4", "--calibration", tile_file,
                             "--calibration-size", 48, "-o", out)
    assert code == 0, output
    flat = " ".join(output.split())
    assert "48 images × 4 views" in flat and "agreement" in flat and "worst refit" in flat
    loaded = load(out)
    assert loaded.plan.init == "calibrated" and loaded.plan.calibration.images == 48
    checked_out = tmp_path / "check.md"
    code, output, _ = invoke("check", out, "--original", "example", "--markdown", checked_out)
    assert code == 0, output
    assert "refit error" in checked_out.read_text()


@pytest.mark.parametrize("args, needles", [
    (["--init", "calibrated"], ["needs unlabeled images", "--calibration"]),
    (["--init", "orbit-average", "--calibration", "TILES"], ["used by the calibrated initialisation"]),
    (["--calibration", "missing.npz"], ["'missing.npz' does not exist"]),
])
def test_cli_calibration_errors_are_one_paragraph(tmp_path, tile_file, args, needles):
    out = tmp_path / "x.orb"
    args = [tile_file if a == "TILES" else a for a in args]
    code, output, errors = invoke("convert", "example", "--group", "c4", *args, "-o", out)
    assert code not in (0, None) and "Traceback" not in output, output
    text = " ".join(errors.split())
    assert text.startswith("error:"), output
    for needle in needles:
        assert needle in text, (needle, output)
    assert not out.exists()


def test_a_recipe_can_choose_the_calibrated_init_and_its_image_count(tmp_path, tile_file):
    from orbify.recipes import load_recipe

    shipped = load_recipe("example").path.read_text()
    assert 'init = "orbit-average"' in shipped and "images = 256" in shipped
    recipe = tmp_path / "calibrated.toml"
    recipe.write_text(shipped.replace('init = "orbit-average"', 'init = "calibrated"')
                      .replace("images = 256", "images = 40").replace('group = "d4"', 'group = "c4"'))
    out = tmp_path / "recipe.orb"
    code, output, _ = invoke("convert", "example", "--recipe", recipe, "-o", out)
    assert code != 0 and "needs unlabeled images" in " ".join(output.split())
    code, output, _ = invoke("convert", "example", "--recipe", recipe, "--calibration", tile_file, "-o", out)
    assert code == 0, output
    assert load(out).plan.calibration.images == 40


def test_tune_can_start_from_a_calibrated_conversion(tmp_path):
    images, labels = make_tiles(96, split="upright", size=33, seed=43)
    data = tmp_path / "tiles.npz"
    np.savez(data, images=images.numpy(), labels=labels.numpy())
    out = tmp_path / "tuned.orb"
    code, output, _ = invoke("tune", "example", "--group", "c4", "--init", "calibrated", "--data", data,
                             "--epochs", 1, "--batch-size", 32, "-o", out)
    assert code == 0, output
    plan = load(out).plan
    assert plan.init == "calibrated" and plan.calibration.images == 96
