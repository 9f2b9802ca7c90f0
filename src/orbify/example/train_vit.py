"""Train the bundled example ViT on upright tiles and save its weights.

Run ``python -m orbify.example.train_vit --out vit_weights.pt`` (options: ``--seed``, ``--epochs``,
``--tiles``, ``--eval-tiles``, ``--force``). The shipped ``orbify/example/vit_weights.pt`` was made with the
defaults. Training, with the loop of :func:`orbify.example.train.fit` and its seed policy, sees upright
particles only, rendered at :data:`~orbify.example.vit_model.VIT_TILE_SIZE` pixels, so the model is good
upright and poor in the field; the end of the run prints both accuracies. The file is written atomically,
an existing one replaced only with ``--force``; with the same seed, torch build and thread count the run is
repeatable bit for bit.
"""

from __future__ import annotations

import time
from pathlib import Path

import typer

from orbify.common.safe_io import save_torch
from orbify.errors import OrbifyError
from orbify.example.data import make_tiles
from orbify.example.train import TrainingResult, accuracy, check_settings, fit, refuse_existing_output
from orbify.example.vit_model import VIT_TILE_SIZE, build_example_vit

DEFAULT_SEED = 0
DEFAULT_EPOCHS = 10
DEFAULT_TILES = 4800
EVALUATION_TILES = 1200
_LEAST_TILES = 64   # one batch of fit()


def train_example_vit(*, seed: int = DEFAULT_SEED, epochs: int = DEFAULT_EPOCHS, num_tiles: int = DEFAULT_TILES,
                      evaluation_tiles: int = EVALUATION_TILES) -> TrainingResult:
    """Train :func:`build_example_vit` on ``num_tiles`` upright tiles of 32 pixels, then measure its accuracy on
    ``evaluation_tiles`` fresh tiles of each split.

    Training tiles use tile seed ``2*seed``, the evaluation tiles ``2*seed + 1`` (as
    :func:`orbify.example.train.train_example_model`). The caller's global torch random state is left as it was.
    Raises :class:`orbify.errors.OptionError` for a negative seed, no epochs, fewer training tiles than one batch
    (64) or no evaluation tiles.
    """
    check_settings("orbify.example.train_vit", seed=(seed, 0), epochs=(epochs, 1), num_tiles=(num_tiles, _LEAST_TILES),
                   evaluation_tiles=(evaluation_tiles, 1))
    started = time.perf_counter()
    images, labels = make_tiles(num_tiles, split="upright", size=VIT_TILE_SIZE, seed=2 * seed)
    model = fit(build_example_vit, images, labels, seed=seed, epochs=epochs)
    upright, any_angle = (accuracy(model, *make_tiles(evaluation_tiles, split=split, size=VIT_TILE_SIZE,
                                                      seed=2 * seed + 1))
                          for split in ("upright", "any"))
    return TrainingResult(model, upright, any_angle, time.perf_counter() - started)


app = typer.Typer(add_completion=False, help="Train the bundled example ViT on upright tiles.")


@app.command()
def main(
    out: Path = typer.Option(Path("vit-weights.pt"), "--out", help="Where to write the state dict."),
    seed: int = typer.Option(DEFAULT_SEED, "--seed", help="Seed for tiles, initialisation and batch order."),
    epochs: int = typer.Option(DEFAULT_EPOCHS, "--epochs", help="Passes over the training tiles."),
    tiles: int = typer.Option(DEFAULT_TILES, "--tiles", help="Number of upright training tiles."),
    eval_tiles: int = typer.Option(EVALUATION_TILES, "--eval-tiles", help="Fresh tiles per split for the accuracies."),
    force: bool = typer.Option(False, "--force", help="Replace OUT if it exists."),
) -> None:
    """Train on upright tiles, print upright and any-angle accuracy, save the weights."""
    try:
        refuse_existing_output(out, force, where="orbify.example.train_vit --out")
        result = train_example_vit(seed=seed, epochs=epochs, num_tiles=tiles, evaluation_tiles=eval_tiles)
        save_torch(result.model.state_dict(), out, force=force)
    except OrbifyError as error:
        typer.echo(f"error: {error}", err=True)
        raise typer.Exit(error.exit_code) from None
    typer.echo(f"trained in {result.seconds:.1f} s on {tiles} upright tiles of {VIT_TILE_SIZE} px ({epochs} epochs, "
               f"seed {seed})")
    typer.echo(f"accuracy upright:    {result.upright_accuracy:.3f}")
    typer.echo(f"accuracy any angle:  {result.any_accuracy:.3f}")
    typer.echo(f"weights written to {out}")


if __name__ == "__main__":
    app()
