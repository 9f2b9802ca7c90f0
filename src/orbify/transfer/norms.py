"""Carrying norm layers over: the statistics and affine parameters of the channels a converted norm carries."""

from __future__ import annotations

import torch
from torch import nn

from orbify.transfer.channels import rows
from orbify.transfer.loading import assign, factory_kwargs

BatchNorm = nn.modules.batchnorm._BatchNorm


def fresh_batch_norm(old: BatchNorm, channels: int) -> BatchNorm:
    """A freshly initialised batch norm like ``old`` (type, options, device, dtype, mode) over ``channels`` channels."""
    like = next((t for t in (old.weight, old.running_mean) if t is not None), None)
    return type(old)(channels, eps=old.eps, momentum=old.momentum, affine=old.affine,
                     track_running_stats=old.track_running_stats,
                     **(factory_kwargs(like) if like is not None else {})).train(old.training)


@torch.no_grad()
def load_norm_rows(module: nn.Module, old: nn.Module, source: torch.Tensor) -> None:
    """Give a converted norm layer the parameters of the original channels ``source`` (one per entry).

    Affine weight and bias (where ``old`` has them), and for batch norms that keep running
    statistics the mean, variance and batch count. Entries −1 (no original channel) get weight 1,
    bias 0, mean 0 and variance 1. Tied parameters keep their orbit average.
    """
    def take(name: str, fill: float) -> torch.Tensor:
        return rows(getattr(old, name).detach(), source, fill)

    for name, fill in (("weight", 1.0), ("bias", 0.0)):
        if getattr(old, name, None) is not None:
            assign(module, name, take(name, fill))
    if isinstance(module, BatchNorm) and module.track_running_stats and old.running_mean is not None:
        module.running_mean.copy_(take("running_mean", 0.0))
        module.running_var.copy_(take("running_var", 1.0))
        module.num_batches_tracked.copy_(old.num_batches_tracked)


def batch_norm_rows(old: BatchNorm, source: torch.Tensor) -> BatchNorm:
    """A plain batch norm over the new channels whose statistics and affine copy the source channels."""
    new = fresh_batch_norm(old, source.numel())
    load_norm_rows(new, old, source)
    return new
