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

from orbify.example.data import make_tiles
from orbify.example.train import TrainingResult, accuracy, check_settings, fit, tile_trainer_app
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


app = tile_trainer_app(train_example_vit, what="ViT", command="orbify.example.train_vit", default_out="vit-weights.pt",
                       defaults=(DEFAULT_SEED, DEFAULT_EPOCHS, DEFAULT_TILES, EVALUATION_TILES))


if __name__ == "__main__":
    app()
