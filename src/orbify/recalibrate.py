"""Re-estimating batch-norm statistics of a converted model on a few batches of unlabeled images."""

from __future__ import annotations

from collections.abc import Iterable

import torch
from torch import nn


@torch.no_grad()
def recalibrate_batch_norm(model: nn.Module, batches: Iterable[torch.Tensor]) -> int:
    """Replace every batch norm's running statistics by their plain average over ``batches``.

    The model runs in training mode for the batch norms only (dropout and the like stay in eval
    mode), each batch norm's momentum is set to ``None`` (cumulative average) for the pass and
    restored after. Returns the number of images seen. No labels and no gradients are needed.
    """
    norms = [m for m in model.modules() if isinstance(m, nn.modules.batchnorm._BatchNorm) and m.track_running_stats]
    if not norms:
        return 0
    training = model.training
    momenta = [m.momentum for m in norms]
    model.eval()
    for m in norms:
        m.reset_running_stats()
        m.momentum = None
        m.train()
    seen = 0
    try:
        for batch in batches:
            model(batch)
            seen += batch.shape[0]
    finally:
        for m, momentum in zip(norms, momenta):
            m.momentum = momentum
        model.train(training)
    return seen
