"""Train the bundled example CNN on upright tiles and save its weights.

Run ``python -m orbify.example.train --out weights.pt`` (options: ``--seed``, ``--epochs``,
``--tiles``, ``--eval-tiles``, ``--force``). The shipped ``orbify/example/weights.pt`` was made
with the defaults. The file is written atomically and an existing one is replaced only with
``--force``. Training sees upright particles only, so the model is good upright and poor in the
field; the end of the run prints both accuracies. With the same seed, torch build and thread
count the run is repeatable bit for bit.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import torch
import typer
from torch import nn

from orbify.common.safe_io import save_torch
from orbify.errors import OptionError, OrbifyError, OutputError
from orbify.example.data import make_tiles
from orbify.example.model import build_example_cnn

DEFAULT_SEED = 0
DEFAULT_EPOCHS = 8
DEFAULT_TILES = 2400
EVALUATION_TILES = 1200
_BATCH_SIZE = 64
_LEARNING_RATE = 3e-3


@dataclass(frozen=True)
class TrainingResult:
    """A trained model (eval mode) with its accuracies on fresh upright and any-angle tiles."""

    model: nn.Module
    upright_accuracy: float
    any_accuracy: float
    seconds: float


@torch.no_grad()
def accuracy(model: nn.Module, images: torch.Tensor, labels: torch.Tensor, batch_size: int = 256) -> float:
    """Fraction of ``images`` whose arg-max logit equals the label. Puts ``model`` in eval mode."""
    model.eval()
    correct = 0
    for start in range(0, len(images), batch_size):
        logits = model(images[start : start + batch_size])
        correct += int((logits.argmax(dim=1) == labels[start : start + batch_size]).sum())
    return correct / max(len(images), 1)


def check_settings(where: str, **settings_and_minimums: tuple[int, int]) -> None:
    """Raise :class:`OptionError` (naming ``where`` and the setting) for a setting that is not an integer of at least
    its minimum; each keyword is ``name=(value, minimum)``."""
    for name, (value, least) in settings_and_minimums.items():
        if not isinstance(value, int) or value < least:
            raise OptionError(
                f"{name} must be an integer of at least {least}, got {value!r}",
                where=f"{where}, setting {name}",
                fix=f"pass {name} >= {least}",
            )


def fit(build: Callable[[], nn.Module], images: torch.Tensor, targets: torch.Tensor, *, seed: int,
        epochs: int) -> nn.Module:
    """A model from ``build()`` trained with Adam and a one-cycle schedule on cross-entropy against ``targets``
    (class indices: (N,) labels, or (N, H, W) masks for a model returning maps), in eval mode.

    ``build`` runs, and batches are drawn, under ``torch.manual_seed(seed)`` inside ``fork_rng``: the caller's
    global torch random state is left as it was. At least one batch (64) of images is needed.
    """
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        model = build()
        optimizer = torch.optim.Adam(model.parameters(), lr=_LEARNING_RATE)
        steps_per_epoch = len(images) // _BATCH_SIZE
        schedule = torch.optim.lr_scheduler.OneCycleLR(
            optimizer, max_lr=_LEARNING_RATE, total_steps=epochs * steps_per_epoch
        )
        loss_function = nn.CrossEntropyLoss()
        for _ in range(epochs):
            model.train()
            order = torch.randperm(len(images))
            for step in range(steps_per_epoch):
                batch = order[step * _BATCH_SIZE : (step + 1) * _BATCH_SIZE]
                optimizer.zero_grad(set_to_none=True)
                loss_function(model(images[batch]), targets[batch]).backward()
                optimizer.step()
                schedule.step()
    return model.eval()


def train_example_model(
    *,
    seed: int = DEFAULT_SEED,
    epochs: int = DEFAULT_EPOCHS,
    num_tiles: int = DEFAULT_TILES,
    evaluation_tiles: int = EVALUATION_TILES,
) -> TrainingResult:
    """Train :func:`build_example_cnn` with Adam on ``num_tiles`` upright tiles, then measure
    accuracy on ``evaluation_tiles`` fresh tiles of each split.

    Training tiles use tile seed ``2*seed``, the evaluation tiles ``2*seed + 1``, so they never
    coincide. The caller's global torch random state is left as it was.
    Raises :class:`orbify.errors.OptionError` for a negative seed, no epochs, fewer training
    tiles than one batch (64) or no evaluation tiles.
    """
    check_settings("orbify.example.train", seed=(seed, 0), epochs=(epochs, 1), num_tiles=(num_tiles, _BATCH_SIZE),
                   evaluation_tiles=(evaluation_tiles, 1))
    started = time.perf_counter()
    model = fit(build_example_cnn, *make_tiles(num_tiles, split="upright", seed=2 * seed), seed=seed, epochs=epochs)
    upright = accuracy(model, *make_tiles(evaluation_tiles, split="upright", seed=2 * seed + 1))
    any_angle = accuracy(model, *make_tiles(evaluation_tiles, split="any", seed=2 * seed + 1))
    return TrainingResult(model, upright, any_angle, time.perf_counter() - started)


def refuse_existing_output(path: Path, force: bool, where: str = "orbify.example.train --out") -> None:
    """Fail before training when saving would fail anyway (the save checks again)."""
    if path.exists() and not force:
        raise OutputError(
            f"The output file {str(path)!r} already exists",
            where=where,
            fix="choose another path, or pass --force to replace it",
        )


def tile_trainer_app(train: Callable[..., TrainingResult], *, what: str, command: str, default_out: str,
                     defaults: tuple[int, int, int, int]) -> typer.Typer:
    """The command line of a trainer of a bundled tile classifier: ``train`` (called with ``seed``, ``epochs``,
    ``num_tiles`` and ``evaluation_tiles``) run from ``--seed``, ``--epochs``, ``--tiles`` and ``--eval-tiles``
    (``defaults``, in that order), the weights written to ``--out`` (refused when it exists, unless ``--force``)
    and both accuracies printed. ``what`` names the model in the help, ``command`` the module in errors."""
    seed_default, epochs_default, tiles_default, evaluation_default = defaults
    app = typer.Typer(add_completion=False, help=f"Train the bundled example {what} on upright tiles.")

    @app.command()
    def main(
        out: Path = typer.Option(Path(default_out), "--out", help="Where to write the state dict."),
        seed: int = typer.Option(seed_default, "--seed", help="Seed for tiles, initialisation and batch order."),
        epochs: int = typer.Option(epochs_default, "--epochs", help="Passes over the training tiles."),
        tiles: int = typer.Option(tiles_default, "--tiles", help="Number of upright training tiles."),
        eval_tiles: int = typer.Option(evaluation_default, "--eval-tiles",
                                       help="Fresh tiles per split for the accuracies."),
        force: bool = typer.Option(False, "--force", help="Replace OUT if it exists."),
    ) -> None:
        """Train on upright tiles, print upright and any-angle accuracy, save the weights."""
        try:
            refuse_existing_output(out, force, where=f"{command} --out")
            result = train(seed=seed, epochs=epochs, num_tiles=tiles, evaluation_tiles=eval_tiles)
            save_torch(result.model.state_dict(), out, force=force)
        except OrbifyError as error:
            typer.echo(f"error: {error}", err=True)
            raise typer.Exit(error.exit_code) from None
        typer.echo(f"trained in {result.seconds:.1f} s on {tiles} upright tiles ({epochs} epochs, seed {seed})")
        typer.echo(f"accuracy upright:    {result.upright_accuracy:.3f}")
        typer.echo(f"accuracy any angle:  {result.any_accuracy:.3f}")
        typer.echo(f"weights written to {out}")

    return app


app = tile_trainer_app(train_example_model, what="CNN", command="orbify.example.train",
                       default_out="example-weights.pt",
                       defaults=(DEFAULT_SEED, DEFAULT_EPOCHS, DEFAULT_TILES, EVALUATION_TILES))


if __name__ == "__main__":
    app()
