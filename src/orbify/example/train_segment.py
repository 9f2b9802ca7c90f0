"""Train the bundled segmentation example on upright scenes and save its weights.

Run ``python -m orbify.example.train_segment --out segment_weights.pt`` (options: ``--seed``,
``--epochs``, ``--scenes``, ``--eval-scenes``, ``--force``). The shipped
``orbify/example/segment_weights.pt`` was made with the defaults. Training, with the loop of
:func:`orbify.example.train.fit`, sees upright particles only, so the model segments upright
scenes well and scenes in the field poorly; the end of the run prints the mean IoU of both. The
file is written atomically, an existing one replaced only with ``--force``; with the same seed,
torch build and thread count the run is repeatable bit for bit.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path

import torch
import typer
from torch import nn

from orbify.common.safe_io import save_torch
from orbify.errors import OrbifyError
from orbify.example.scenes import SEGMENT_CLASSES, make_scenes
from orbify.example.segment_model import build_example_segmenter
from orbify.example.train import check_settings, fit, refuse_existing_output
from orbify.verification.segmentation import SegmentationScores, confusion

DEFAULT_SEED = 0
DEFAULT_EPOCHS = 12
DEFAULT_SCENES = 2000
EVALUATION_SCENES = 400
_LEAST_SCENES = 64   # one batch of fit()


@dataclass(frozen=True)
class SegmenterTrainingResult:
    """A trained segmenter (eval mode) with its mean IoU on fresh upright and any-angle scenes."""

    model: nn.Module
    upright_iou: float
    any_iou: float
    seconds: float


@torch.no_grad()
def segmentation_scores(model: nn.Module, images: torch.Tensor, masks: torch.Tensor,
                        batch_size: int = 64) -> SegmentationScores:
    """Per-pixel accuracy and IoU of ``model``'s arg-max maps against ``masks``, over all pixels of ``images``; the
    model is used as it is (in eval mode, or an exported program's module)."""
    matrix = sum(confusion(model(chunk).argmax(1), truth, len(SEGMENT_CLASSES))
                 for chunk, truth in zip(images.split(batch_size), masks.split(batch_size)))
    return SegmentationScores.from_confusion(matrix)


def train_example_segmenter(*, seed: int = DEFAULT_SEED, epochs: int = DEFAULT_EPOCHS,
                            num_scenes: int = DEFAULT_SCENES,
                            evaluation_scenes: int = EVALUATION_SCENES) -> SegmenterTrainingResult:
    """Train :func:`build_example_segmenter` on ``num_scenes`` upright scenes, then measure its mean IoU on
    ``evaluation_scenes`` fresh scenes of each split.

    Training scenes use scene seed ``2*seed``, the evaluation scenes ``2*seed + 1``. The caller's global torch
    random state is left as it was. Raises :class:`orbify.errors.OptionError` for a negative seed, no epochs,
    fewer training scenes than one batch (64) or no evaluation scenes.
    """
    check_settings("orbify.example.train_segment", seed=(seed, 0), epochs=(epochs, 1),
                   num_scenes=(num_scenes, _LEAST_SCENES), evaluation_scenes=(evaluation_scenes, 1))
    started = time.perf_counter()
    images, masks = make_scenes(num_scenes, split="upright", seed=2 * seed)
    model = fit(build_example_segmenter, images, masks, seed=seed, epochs=epochs)
    upright, any_angle = (segmentation_scores(model, *make_scenes(evaluation_scenes, split=split, seed=2 * seed + 1))
                          for split in ("upright", "any"))
    return SegmenterTrainingResult(model, upright.mean_iou, any_angle.mean_iou, time.perf_counter() - started)


app = typer.Typer(add_completion=False, help="Train the bundled segmentation example on upright scenes.")


@app.command()
def main(
    out: Path = typer.Option(Path("segment-weights.pt"), "--out", help="Where to write the state dict."),
    seed: int = typer.Option(DEFAULT_SEED, "--seed", help="Seed for scenes, initialisation and batch order."),
    epochs: int = typer.Option(DEFAULT_EPOCHS, "--epochs", help="Passes over the training scenes."),
    scenes: int = typer.Option(DEFAULT_SCENES, "--scenes", help="Number of upright training scenes."),
    eval_scenes: int = typer.Option(EVALUATION_SCENES, "--eval-scenes", help="Fresh scenes per split for the IoU."),
    force: bool = typer.Option(False, "--force", help="Replace OUT if it exists."),
) -> None:
    """Train on upright scenes, print upright and any-angle mean IoU, save the weights."""
    try:
        refuse_existing_output(out, force, where="orbify.example.train_segment --out")
        result = train_example_segmenter(seed=seed, epochs=epochs, num_scenes=scenes, evaluation_scenes=eval_scenes)
        save_torch(result.model.state_dict(), out, force=force)
    except OrbifyError as error:
        typer.echo(f"error: {error}", err=True)
        raise typer.Exit(error.exit_code) from None
    typer.echo(f"trained in {result.seconds:.1f} s on {scenes} upright scenes ({epochs} epochs, seed {seed})")
    typer.echo(f"mean IoU upright:    {result.upright_iou:.3f}")
    typer.echo(f"mean IoU any angle:  {result.any_iou:.3f}")
    typer.echo(f"weights written to {out}")


if __name__ == "__main__":
    app()
