"""Size and cost of a model: stored parameters, multiply-accumulates per inference, bytes on disk."""

from __future__ import annotations

import io
from collections.abc import Iterator
from contextlib import contextmanager

import torch
from torch import nn
from torch.nn.utils import parametrize
from torch.utils.flop_counter import FlopCounterMode, sdpa_flop_count

from orbify.common.modes import module_mode


def count_params(module: nn.Module) -> int:
    """Number of parameter values the module stores.

    For a weight tied with ``torch.nn.utils.parametrize`` this counts the stored
    ``parametrizations.<name>.original`` tensors (the free parameters), not the larger weight
    they expand to: a parametrized module registers only the originals (and any parameters
    of the parametrizations themselves) as parameters. Shared parameters count once.
    """
    return sum(parameter.numel() for parameter in module.parameters())


def count_macs(module: nn.Module, example_input: torch.Tensor | tuple[torch.Tensor, ...]) -> int:
    """Multiply-accumulates of one inference on ``example_input``, counted by ``FlopCounterMode``.

    Runs ``module(example_input)`` (or ``module(*example_input)`` for a tuple) in eval mode
    under ``torch.no_grad()`` and returns FLOPs / 2. Tied weights are expanded once beforehand
    (``parametrize.cached()``), so the count is that of inference with the expanded weights,
    as after baking. The module's training mode is restored afterwards.
    """
    inputs = example_input if isinstance(example_input, tuple) else (example_input,)
    with inference_flops(module) as counter:
        module(*inputs)
    return counter.get_total_flops() // 2


@contextmanager
def inference_flops(module: nn.Module) -> Iterator[FlopCounterMode]:
    """Count the FLOPs of what runs in the block as inference of ``module`` after baking.

    Inside the block ``module`` is in eval mode (its mode is restored afterwards), gradients are
    off, and every parametrized tensor has been computed once into the ``parametrize.cached()``
    cache, so tied weights are expanded before counting starts and not counted.

    Attention is counted whole: ``nn.MultiheadAttention``'s fused fast path (which the counter does
    not see into) is off inside the block, and torch's CPU attention kernel, for which the counter
    has no formula, is counted by the formula of its other attention kernels.
    """
    with module_mode(module, training=False), torch.no_grad(), parametrize.cached(), _attention_fast_path(False):
        expand_parametrized_tensors(module)
        with FlopCounterMode(display=False, custom_mapping=_ATTENTION_FLOPS) as counter:
            yield counter


def _cpu_attention_flops(query, key, value, *args, out_shape=None, **kwargs) -> int:
    """FLOPs of torch's CPU attention kernel: its q·kᵀ and attention·v products (``sdpa_flop_count``)."""
    return sdpa_flop_count(query, key, value)


_ATTENTION_FLOPS = {torch.ops.aten._scaled_dot_product_flash_attention_for_cpu: _cpu_attention_flops}


@contextmanager
def _attention_fast_path(enabled: bool) -> Iterator[None]:
    """``nn.MultiheadAttention``'s fused inference path switched on or off inside the block."""
    before = torch.backends.mha.get_fastpath_enabled()
    torch.backends.mha.set_fastpath_enabled(enabled)
    try:
        yield
    finally:
        torch.backends.mha.set_fastpath_enabled(before)


def expand_parametrized_tensors(module: nn.Module) -> None:
    """Compute every parametrized tensor once, filling the ``parametrize.cached()`` cache."""
    for submodule in module.modules():
        if parametrize.is_parametrized(submodule):
            for name in submodule.parametrizations:
                getattr(submodule, name)


def state_dict_bytes(module: nn.Module) -> int:
    """Size in bytes of ``torch.save(module.state_dict())``, measured in memory."""
    buffer = io.BytesIO()
    torch.save(module.state_dict(), buffer)
    return buffer.getbuffer().nbytes
