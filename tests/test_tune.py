"""Tuning by distillation (orbify.tuning.loop, orbify.tuning.teacher): the teacher's view combinations, the training
loop on scikit-learn's digits, invariance after tuning, exact resumption from checkpoints, bad input."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.special import rel_entr, softmax
from torch import nn

from orbify import convert, parse_group
from orbify.errors import CheckpointError, DataError, OptionError, OutputError
from orbify.tuning.dataset import holdout_split
from orbify.tuning.loop import tune
from orbify.tuning.teacher import VIEW_COMBINATIONS, GroupAveraged, combine_views

SIZE = 9


# -- small models and data shared with test_tune_distributed.py ------------------------------------
def tiny_original(classes: int = 3) -> nn.Module:
    """A small plain classifier with batch norm and dropout, the same on every call (seeded)."""
    torch.manual_seed(0)
    return nn.Sequential(
        nn.Conv2d(1, 8, 3, padding=1), nn.BatchNorm2d(8), nn.ReLU(),
        nn.Conv2d(8, 8, 3, stride=2, padding=1), nn.BatchNorm2d(8), nn.ReLU(),
        nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Dropout(0.2), nn.Linear(8, classes),
    ).eval()


def tiny_student(original: nn.Module, group="c4") -> nn.Module:
    student, _ = convert(original, group, example_input=torch.zeros(1, 1, SIZE, SIZE))
    return student


def tiny_data(count: int = 60, classes: int = 3) -> tuple[torch.Tensor, torch.Tensor]:
    generator = torch.Generator().manual_seed(1)
    return torch.rand(count, 1, SIZE, SIZE, generator=generator), torch.randint(0, classes, (count,), generator=generator)


def max_invariance_error(model: nn.Module, group, images: torch.Tensor) -> float:
    """max over g of ‖f(g·x) − f(x)‖ / ‖f(x)‖."""
    with torch.no_grad():
        upright = model(images)
        return max(float((model(group.act_grid(g, images)) - upright).norm() / upright.norm())
                   for g in range(group.order))



# -- the teacher ------------------------------------------------------------------------------------
def test_view_combinations_match_scipy():
    logits = torch.randn(4, 5, 3, dtype=torch.float64, generator=torch.Generator().manual_seed(0))
    views = logits.numpy()
    probabilities = softmax(views, axis=-1)   # scipy.special.softmax is the reference
    expected = {
        "probability": np.log(probabilities.mean(0)),
        "logit": np.log(softmax(views.mean(0), axis=-1)),
        "most-confident": np.log(probabilities[probabilities.max(-1).argmax(0), np.arange(5)]),
    }
    for how in VIEW_COMBINATIONS:
        np.testing.assert_allclose(combine_views(logits, how).numpy(), expected[how], rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("how", VIEW_COMBINATIONS)
def test_group_averaged_original_is_invariant(how):
    group = parse_group("d4")
    teacher = GroupAveraged(tiny_original().double(), group, how)
    images = tiny_data(8)[0].double()
    assert max_invariance_error(teacher, group, images) < 1e-12


def test_unknown_view_combination_is_refused():
    with pytest.raises(OptionError, match="most-confident"):
        combine_views(torch.zeros(4, 2, 3), "median")


# -- tuning on scikit-learn's digits -----------------------------------------------------------------
@pytest.fixture(scope="module")
def digits():
    """A small plain CNN trained on upright digits only (scikit-learn's bundled data, 9s dropped)."""
    from orbify.experiments.digits import load_digit_splits, train_digits_cnn

    splits = load_digit_splits(seed=0)
    return splits, train_digits_cnn(splits, epochs=8, seed=0, width=16)


def test_tuning_lowers_the_loss_raises_rotated_accuracy_and_keeps_invariance(digits):
    splits, original = digits
    group = parse_group("c4")
    student = tiny_student(original, group)
    result = tune(student, original, group, splits.train_images, splits.train_labels, epochs=4, lr=3e-3,
                  batch_size=64, view_combination="most-confident", label_weight=0.0, holdout_fraction=0.2,
                  seed=0, progress=False)

    assert result.final.measure == "accuracy"
    assert result.final.loss < 0.8 * result.before.loss
    assert result.final.transformed > result.before.transformed + 0.1
    # With an upright-only original the most confident view is the best teacher (docs/design.md §13).
    assert result.teacher_accuracy["most-confident"] > result.teacher_accuracy["probability"]
    # Held-out accuracy on the test split moved by every element, measured independently of the tuner, beside
    # the two alternatives on the same moved digits: the unconverted original (measured 0.33; tuned 0.50), and
    # the original averaged over the group with the teacher's own combination, the tuning's target (0.83). Four
    # epochs close part of that gap: the margin 0.4 stands above the measured 0.33. The averaged original is
    # invariant (test_group_averaged_original_is_invariant), so its accuracy on the upright digits is the same
    # as on every moved copy.
    from orbify.experiments.digits import accuracy, accuracy_every_element
    tuned = accuracy_every_element(student, group, splits.test_images, splits.test_labels)
    plain = accuracy_every_element(original, group, splits.test_images, splits.test_labels)
    averaged = accuracy(GroupAveraged(original, group, "most-confident"), splits.test_images, splits.test_labels)
    assert tuned >= plain + 0.1, (tuned, plain)
    assert tuned >= averaged - 0.4, (tuned, averaged)

    assert not student.training
    assert max_invariance_error(student, group, splits.test_images[:64]) < 1e-5
    assert max_invariance_error(student.double(), group, splits.test_images[:64].double()) < 1e-12


def test_reported_loss_is_the_kl_divergence_from_teacher_to_student():
    original, (images, labels) = tiny_original(), tiny_data()
    group = parse_group("c4")
    student = tiny_student(original)
    _, held_out = holdout_split(len(images), 0.25, 5)
    with torch.no_grad():
        teacher = GroupAveraged(original, group, "logit")(images[held_out]).exp().double().numpy()
        learner = student(images[held_out]).softmax(-1).double().numpy()
    result = tune(student, original, group, images, labels, epochs=1, holdout_fraction=0.25, seed=5,
                  view_combination="logit", recalibrate=False, progress=False)
    # scipy.special.rel_entr(p, q) = p·log(p/q): its sum over classes is KL(p ‖ q).
    assert result.before.loss == pytest.approx(rel_entr(teacher, learner).sum(1).mean(), rel=1e-4)
    assert result.before.upright == pytest.approx(float((learner.argmax(1) == labels[held_out].numpy()).mean()))


def test_without_labels_it_reports_agreement_with_the_teacher():
    original, (images, _) = tiny_original(), tiny_data()
    result = tune(tiny_student(original), original, "c4", images, epochs=1, batch_size=16, progress=False)
    assert result.final.measure == "agreement"
    assert result.teacher_accuracy == {}
    assert 0.0 <= result.final.upright <= 1.0


# -- checkpoints --------------------------------------------------------------------------------------
class Interrupted(Exception):
    pass


def _run(tmp_path, **overrides):
    original, (images, labels) = tiny_original(), tiny_data()
    student = tiny_student(original)
    options = dict(epochs=3, lr=1e-2, batch_size=8, seed=7, schedule="one-cycle",
                   checkpoint_path=tmp_path / "tune.pt", progress=False)
    options.update(overrides)
    return student, tune(student, original, "c4", images, labels, **options)


def test_resuming_from_a_checkpoint_gives_the_same_weights_as_an_uninterrupted_run(tmp_path):
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    uninterrupted, expected = _run(tmp_path / "a")

    def stop_after_first(record):
        if record.epoch == 1:
            raise Interrupted

    with pytest.raises(Interrupted):
        _run(tmp_path / "b", on_epoch_end=stop_after_first)
    resumed, result = _run(tmp_path / "b", resume=True)

    assert result.resumed_after == 1
    assert [r.train_loss for r in result.history] == [r.train_loss for r in expected.history]
    reference = uninterrupted.state_dict()
    for key, value in resumed.state_dict().items():
        assert torch.equal(value, reference[key]), key


def test_a_checkpoint_is_not_replaced_unasked(tmp_path):
    _run(tmp_path, epochs=1)
    with pytest.raises(OutputError, match="already exists"):
        _run(tmp_path, epochs=1)
    _run(tmp_path, epochs=1, force=True)


def test_resuming_with_other_options_is_refused(tmp_path):
    _run(tmp_path, epochs=1)
    with pytest.raises(CheckpointError, match="lr"):
        _run(tmp_path, epochs=1, lr=1e-3, resume=True)


def test_resuming_a_finished_run_trains_no_further(tmp_path):
    done, first = _run(tmp_path, epochs=1)
    again, second = _run(tmp_path, epochs=1, resume=True)
    assert second.resumed_after == 1 and len(second.history) == 1
    assert all(torch.equal(value, done.state_dict()[key]) for key, value in again.state_dict().items())


# -- bad input ----------------------------------------------------------------------------------------
@pytest.mark.parametrize("labels, message", [
    (torch.zeros(5, dtype=torch.long), "do not fit"),
    (torch.full((60,), 7), "classes"),
])
def test_bad_labels_are_refused(labels, message):
    original, (images, _) = tiny_original(), tiny_data()
    with pytest.raises(DataError, match=message):
        tune(tiny_student(original), original, "c4", images, labels, epochs=1, progress=False)


@pytest.mark.parametrize("options, message", [
    (dict(view_combination="mean"), "view combination"),
    (dict(schedule="step"), "schedule"),
    (dict(holdout_fraction=1.0), "holdout_fraction"),
    (dict(resume=True), "checkpoint path"),
    (dict(distributed=True), "torchrun"),
])
def test_bad_options_are_refused(options, message):
    original, (images, labels) = tiny_original(), tiny_data()
    with pytest.raises(OptionError, match=message):
        tune(tiny_student(original), original, "c4", images, labels, epochs=1, progress=False, **options)


def test_images_must_be_a_float_batch():
    original = tiny_original()
    with pytest.raises(DataError, match="N, C, H, W"):
        tune(tiny_student(original), original, "c4", torch.zeros(10, 9, 9), progress=False)


# -- the command line -----------------------------------------------------------------------------------
def _cli_files(tmp_path):
    """An .npz of labelled images and the original's weights; the original is the factory 'test_tune:tiny_original'."""
    images, labels = tiny_data()
    np.savez(tmp_path / "data.npz", images=images.numpy(), labels=labels.numpy())
    torch.save(tiny_original().state_dict(), tmp_path / "original.pt")
    return tmp_path / "data.npz", tmp_path / "original.pt"


def test_cli_tunes_a_source_converted_on_the_fly_then_the_saved_file(tmp_path):
    from typer.testing import CliRunner

    from orbify.cli import app
    from orbify.files.saving import load

    runner = CliRunner()
    data, weights = _cli_files(tmp_path)
    first = tmp_path / "tuned.orb"
    common = ["--data", str(data), "--epochs", "1", "--batch-size", "16"]
    result = runner.invoke(app, ["tune", "test_tune:tiny_original", "--weights", str(weights), "--group", "c4",
                                 *common, "-o", str(first)])
    assert result.exit_code == 0, result.output
    assert "held-out loss" in result.output and first.is_file() and (tmp_path / "tuned.orb.checkpoint").is_file()
    tuned = load(first, original="test_tune:tiny_original")
    assert tuned.metadata["source"] == "test_tune:tiny_original" and tuned.plan.group == "c4"
    assert max_invariance_error(tuned.module, parse_group("c4"), tiny_data(8)[0]) < 1e-5

    again = runner.invoke(app, ["tune", "test_tune:tiny_original", "--weights", str(weights), "--group", "c4",
                                *common, "-o", str(first)])
    assert again.exit_code == 2 and "already exists" in again.output and "Traceback" not in again.output

    second = tmp_path / "tuned-again.orb"
    refused = runner.invoke(app, ["tune", str(first), "--weights", str(weights), *common, "-o", str(second)])
    assert refused.exit_code == 2 and "--trust-source" in refused.output and not second.exists()
    unweighted = runner.invoke(app, ["tune", str(first), "--trust-source", *common, "-o", str(second)])
    assert unweighted.exit_code == 2 and "--weights" in unweighted.output
    result = runner.invoke(app, ["tune", str(first), "--trust-source", "--weights", str(weights), "--views",
                                 "most-confident",
                                 "--no-labels", *common, "-o", str(second)])
    assert result.exit_code == 0, result.output
    assert "agreement" in result.output and second.is_file()
