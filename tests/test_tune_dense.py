"""Dense outputs (docs/design.md §18): the per-pixel teacher against a numpy reference, the segmentation scores against
scikit-learn, tuning a segmenter on masks end to end (API and command line), and masks that must be refused."""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch
from PIL import Image
from scipy.special import log_softmax, logsumexp
from sklearn.metrics import jaccard_score
from torch import nn

from orbify import check_model, convert, parse_group
from orbify.data.images import ImageSet
from orbify.errors import DataError
from orbify.tuning.loop import tune
from orbify.tuning.teacher import VIEW_COMBINATIONS, GroupAveraged, teach
from orbify.verification.segmentation import SegmentationScores, confusion, group_scores

SIZE = 9
CLASSES = 3


def tiny_segmenter() -> nn.Module:
    """A small plain dense model (the same on every call): class scores per pixel, (N, 3, H, W)."""
    torch.manual_seed(0)
    return nn.Sequential(
        nn.Conv2d(1, 8, 3, padding=1), nn.BatchNorm2d(8), nn.ReLU(),
        nn.Conv2d(8, 8, 3, padding=1), nn.ReLU(), nn.Conv2d(8, CLASSES, 1),
    ).eval()


def scenes(count: int = 48, seed: int = 1) -> tuple[torch.Tensor, torch.Tensor]:
    """Images and masks: class 1 where the pixel is bright, class 2 where it is dark, 0 between (learnable per pixel)."""
    images = torch.rand(count, 1, SIZE, SIZE, generator=torch.Generator().manual_seed(seed))
    masks = torch.zeros(count, SIZE, SIZE, dtype=torch.long)
    masks[images[:, 0] > 0.7] = 1
    masks[images[:, 0] < 0.3] = 2
    return images, masks


# -- the dense teacher against numpy ----------------------------------------------------------------
def _numpy_teacher(model: nn.Module, images: np.ndarray, elements, how: str) -> np.ndarray:
    """The per-pixel teacher written with numpy alone: each view g·x (numpy.flip, then numpy.rot90), the model's map
    moved back with numpy.rot90 (−k turns) and numpy.flip, then the views combined at every pixel."""
    backs = []
    for k, mirrored in elements:
        view = np.rot90(np.flip(images, -1) if mirrored else images, k, axes=(-2, -1))
        with torch.no_grad():
            out = model(torch.from_numpy(np.ascontiguousarray(view))).double().numpy()
        back = np.rot90(out, -k, axes=(-2, -1))
        backs.append(np.flip(back, -1) if mirrored else back)
    logits = np.stack(backs)                                   # (views, N, classes, H, W)
    log_p = log_softmax(logits, axis=2)
    if how == "probability":
        return logsumexp(log_p, axis=0) - np.log(len(elements))
    if how == "logit":
        return log_softmax(logits.mean(0), axis=1)
    best = log_p.max(axis=2).argmax(0)                         # the most confident view at each pixel
    return np.take_along_axis(log_p, best[None, :, None], axis=0)[0]


@pytest.mark.parametrize("how", VIEW_COMBINATIONS)
def test_the_dense_teacher_is_the_per_pixel_combination_of_views_moved_back(how):
    model = tiny_segmenter().double()
    group = parse_group("d4")
    images = np.random.default_rng(0).normal(size=(3, 1, SIZE, SIZE))
    taught = teach(model, group, torch.from_numpy(images), how)
    expected = _numpy_teacher(model, images, group.elements, how)
    np.testing.assert_allclose(taught.log_probabilities.double().numpy(), expected, atol=1e-5)
    averaged = GroupAveraged(model, group, how)(torch.from_numpy(images))
    np.testing.assert_allclose(averaged.detach().numpy(), expected, atol=1e-12)


def test_the_dense_teacher_moves_with_its_input():
    model, group = tiny_segmenter(), parse_group("d4")
    x = torch.randn(2, 1, SIZE, SIZE)
    teacher = GroupAveraged(model, group, "most-confident")
    for g in range(group.order):
        torch.testing.assert_close(teacher(group.act_grid(g, x)), group.act_grid(g, teacher(x)))


# -- the scores against scikit-learn -----------------------------------------------------------------
def test_iou_and_pixel_accuracy_match_scikit_learn():
    rng = np.random.default_rng(3)
    truth = rng.integers(0, 4, size=(5, 11, 11))
    predicted = np.where(rng.random(truth.shape) < 0.6, truth, rng.integers(0, 4, size=truth.shape))
    truth[0, :3] = -1                                          # unlabelled pixels are left out
    scores = SegmentationScores.from_confusion(confusion(torch.from_numpy(predicted), torch.from_numpy(truth), 5))
    kept = truth >= 0
    per_class = jaccard_score(truth[kept], predicted[kept], labels=[0, 1, 2, 3], average=None)  # scikit-learn
    np.testing.assert_allclose(scores.class_iou[:4], per_class, rtol=1e-12)
    assert scores.class_iou[4] is None                          # class 4 occurs in neither map
    assert scores.mean_iou == pytest.approx(jaccard_score(truth[kept], predicted[kept], average="macro"), rel=1e-12)
    assert scores.accuracy == pytest.approx(float((truth[kept] == predicted[kept]).mean()), rel=1e-12)


def test_group_scores_move_the_masks_with_the_images():
    model, group = tiny_segmenter(), parse_group("c4")
    images, _ = scenes(6)
    with torch.no_grad():
        masks = model(images).argmax(1)                         # the model's own upright map: perfect upright
    scores = group_scores(model, [(images, masks)], group, CLASSES)
    assert scores.upright.accuracy == 1.0 and scores.upright.mean_iou == 1.0
    student, _ = convert(model, group, head="map", example_input=torch.zeros(1, 1, SIZE, SIZE))
    moved = group_scores(student, [(images, masks)], group, CLASSES)
    assert moved.moved_mean_iou == pytest.approx(moved.upright.mean_iou, abs=1e-12)   # equivariant: alike everywhere


# -- tuning on masks ---------------------------------------------------------------------------------
def test_tuning_a_segmenter_on_masks_raises_its_iou_and_keeps_it_equivariant():
    original = tiny_segmenter()
    student, _ = convert(original, "c4", head="map", example_input=torch.zeros(1, 1, SIZE, SIZE))
    images, masks = scenes()
    masks[:, 0, 0] = 255                                       # ignored pixels
    result = tune(student, original, "c4", images, masks=masks, epochs=4, lr=1e-2, batch_size=8, progress=False,
                  device="cpu", workers=0, label_weight=1.0, class_weights=[1.0, 1.0, 1.0])
    assert result.final.measure == "accuracy" and set(result.teacher_iou) == set(VIEW_COMBINATIONS)
    before, after = result.before.segmentation, result.final.segmentation
    assert after.upright.mean_iou > before.upright.mean_iou + 0.2, (before, after)
    assert result.history[-1].train_loss < result.history[0].train_loss
    assert result.teacher_online                                # auto: a dense teacher runs online
    group, x = parse_group("c4"), images[:4]
    with torch.no_grad():
        for g in range(group.order):
            torch.testing.assert_close(student(group.act_grid(g, x)), group.act_grid(g, student(x)),
                                       atol=1e-5, rtol=1e-5)


def test_a_cached_dense_teacher_gives_the_same_run_as_an_online_one():
    original = tiny_segmenter()
    images, masks = scenes(24)
    runs = []
    for mode in ("cached", "online"):
        student, _ = convert(original, "c4", head="map", example_input=torch.zeros(1, 1, SIZE, SIZE))
        result = tune(student, original, "c4", images, masks=masks, epochs=1, batch_size=8, progress=False,
                      device="cpu", workers=0, teacher=mode)
        runs.append((result.history[-1].train_loss, student.state_dict()))
    assert runs[0][0] == pytest.approx(runs[1][0], rel=1e-2)   # the cache holds float16 rows


def test_masks_outside_the_classes_are_refused_naming_the_sample():
    original = tiny_segmenter()
    student, _ = convert(original, "c4", head="map", example_input=torch.zeros(1, 1, SIZE, SIZE))
    images, masks = scenes(24)
    masks[5, 2, 3] = 7
    with pytest.raises(DataError, match=r"images\[5\].*7.*3 classes"):
        tune(student, original, "c4", images, masks=masks, epochs=1, batch_size=8, progress=False, device="cpu",
             workers=0, holdout_fraction=0.5, seed=0)


def test_masks_for_a_classifier_are_refused():
    from test_tune import tiny_original
    original = tiny_original()
    student, _ = convert(original, "c4", example_input=torch.zeros(1, 1, SIZE, SIZE))
    images, masks = scenes(24)
    with pytest.raises(DataError, match="mask of 9×9 pixels.*one class score vector"):
        tune(student, original, "c4", images, masks=masks, epochs=1, batch_size=8, progress=False, device="cpu",
             workers=0)


# -- the check with masks ----------------------------------------------------------------------------
def test_the_check_scores_both_models_against_masks_moved_with_the_images():
    original = tiny_segmenter()
    converted, plan = convert(original, "d4", head="map", example_input=torch.zeros(1, 1, SIZE, SIZE))
    images, masks = scenes(8)
    report = check_model(converted, original, plan, ImageSet(images, masks=masks))
    assert set(report.segmentation) == {"original", "converted"}
    converted_scores = report.segmentation["converted"]
    assert converted_scores.worst_iou == pytest.approx(converted_scores.upright.mean_iou, abs=1e-9)
    with torch.no_grad():
        expected = SegmentationScores.from_confusion(confusion(original(images).argmax(1), masks, CLASSES))
    assert report.segmentation["original"].upright == expected
    data = report.to_dict()["segmentation"]
    assert json.loads(json.dumps(data))["converted"]["upright"]["mean_iou"] == converted_scores.upright.mean_iou


# -- the command line --------------------------------------------------------------------------------
def _mask_folder(root, images: torch.Tensor, masks: torch.Tensor):
    """images/ and masks/ sub-folders paired by stem (PNG files written with Pillow)."""
    (root / "images").mkdir(parents=True)
    (root / "masks").mkdir()
    for i, (image, mask) in enumerate(zip(images, masks)):
        Image.fromarray((image[0].numpy() * 255).round().astype(np.uint8)).save(root / "images" / f"s{i:03d}.png")
        Image.fromarray(mask.numpy().astype(np.uint8)).save(root / "masks" / f"s{i:03d}.png")
    return root


def _cli(*args):
    from typer.testing import CliRunner

    from orbify.cli import app
    return CliRunner().invoke(app, [str(a) for a in args])


def test_the_tune_command_tunes_a_segmenter_from_image_and_mask_folders(tmp_path):
    images, masks = scenes(24)
    data = _mask_folder(tmp_path / "scenes", images, masks)
    torch.save(tiny_segmenter().state_dict(), tmp_path / "original.pt")
    out = tmp_path / "tuned.orb"
    result = _cli("tune", "test_tune_dense:tiny_segmenter", "--weights", tmp_path / "original.pt", "--group", "c4",
                  "--head", "map", "--data", data, "--epochs", "1", "--batch-size", "8", "--workers", "0", "-o", out)
    assert result.exit_code == 0, result.output
    flat = " ".join(result.output.split())
    assert "mean IoU" in flat and "teacher: online" in flat and out.is_file()


def test_the_tune_command_refuses_a_mask_outside_the_classes_writing_nothing(tmp_path):
    images, masks = scenes(24)
    masks[4, 1, 1] = 9
    data = _mask_folder(tmp_path / "scenes", images, masks)
    torch.save(tiny_segmenter().state_dict(), tmp_path / "original.pt")
    before = sorted(p.name for p in tmp_path.rglob("*"))
    result = _cli("tune", "test_tune_dense:tiny_segmenter", "--weights", tmp_path / "original.pt", "--group", "c4",
                  "--head", "map", "--data", data, "--epochs", "1", "--batch-size", "8", "--workers", "0",
                  "--holdout", "0.5", "-o", tmp_path / "tuned.orb")
    assert result.exit_code == 2 and "Traceback" not in result.output, result.output
    flat = " ".join(result.output.split())
    assert "s004.png" in flat and "9" in flat
    assert sorted(p.name for p in tmp_path.rglob("*")) == before
