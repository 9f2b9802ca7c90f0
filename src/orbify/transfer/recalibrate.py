"""Re-estimating batch-norm statistics of a converted model on a few batches of unlabeled images.

The procedure is described in docs/design.md §10.
"""

from __future__ import annotations

from collections.abc import Iterable

import torch
from torch import nn

from orbify.common.modes import module_mode
from orbify.errors import OptionError


@torch.no_grad()
def recalibrate_batch_norm(model: nn.Module, batches: Iterable[torch.Tensor]) -> int:
    """Replace every batch norm's running statistics by their plain average over ``batches``.

    The model runs in training mode for the batch norms only (dropout and the like stay in eval
    mode), each batch norm's momentum is set to ``None`` (cumulative average) for the pass and
    restored after. Returns the number of images seen. No labels and no gradients are needed.
    ``convert(..., calibration=batches)`` calls this on the converted model and notes it in the plan.

    Raises OptionError when ``batches`` holds no image; then, as after any error on the way, the
    statistics are left as they were.
    """
    norms = [m for m in model.modules() if isinstance(m, nn.modules.batchnorm._BatchNorm) and m.track_running_stats]
    if not norms:
        return 0
    momenta = [m.momentum for m in norms]
    saved = [(m.running_mean.clone(), m.running_var.clone(), m.num_batches_tracked.clone()) for m in norms]
    seen, done = 0, False
    with module_mode(model, training=False):
        for m in norms:
            m.reset_running_stats()
            m.momentum = None
            m.train()
        try:
            for batch in batches:
                model(batch)
                seen += batch.shape[0]
            done = seen > 0
        finally:
            for m, momentum in zip(norms, momenta):
                m.momentum = momentum
            if not done:   # no image, or an error on the way: the statistics stay as they were
                for m, (mean, var, count) in zip(norms, saved):
                    m.running_mean.copy_(mean)
                    m.running_var.copy_(var)
                    m.num_batches_tracked.copy_(count)
    if seen == 0:
        raise OptionError("Batch-norm recalibration was given no images", where="calibration batches",
                          fix="give at least one batch of images shaped like the model's input")
    return seen
