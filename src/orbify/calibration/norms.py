"""Norm layers in a calibrated conversion: the kept channels' parameters, and the refit's constant and moments.

Before any refit, every norm layer takes the statistics and affine parameters of the original
channels it now carries (:func:`load_kept_norms`). After a layer is refitted, the batch norm that
follows it absorbs the constant of the fit and, with ``refit_norms``, matches the original's
output moments (:func:`absorb_fit`).
"""

from __future__ import annotations

import torch
from torch import fx, nn
from torch.nn.utils import parametrize

from orbify.calibration.equations import Solution
from orbify.layers.tied import OrbitBatchNorm
from orbify.transfer.channels import ChannelMap
from orbify.transfer.norms import load_norm_rows


def load_kept_norms(converted: fx.GraphModule, view_graph: fx.GraphModule, maps: dict[fx.Node, ChannelMap | None],
                    order: int) -> None:
    """Give every norm layer of ``converted`` the parameters of the original channels its input carries.

    ``view_graph`` holds the original's norm layers at the same module paths; an orbit batch norm
    takes slot 0's channel of every orbit.
    """
    for node in converted.graph.nodes:
        if node.op != "call_module" or maps.get(node.args[0]) is None:
            continue
        module, old = converted.get_submodule(node.target), view_graph.get_submodule(node.target)
        source = maps[node.args[0]].source
        if isinstance(module, OrbitBatchNorm):
            load_norm_rows(module, old, source[::order])
        elif isinstance(module, (nn.modules.batchnorm._BatchNorm, nn.GroupNorm, nn.LayerNorm)):
            load_norm_rows(module, old, source)


def absorb_fit(norm: nn.Module, solution: Solution, folded: torch.Tensor | None, refit_norms: bool) -> None:
    """Move the constant of the fit into the running mean and, with ``refit_norms``, match the output's moments.

    ``folded`` is the fitted intercept when the refitted layer has no bias to hold it. With
    ``refit_norms`` the batch norm maps the refitted output to the mean and variance that the
    original's batch norm gives the original's output: std' = std·√(var_fit/var_target),
    mean' = mean_fit − (mean_target − mean)·std'/std. Otherwise :func:`_own_statistics`.
    """
    mean = norm.running_mean.double()
    std = (norm.running_var.double() + norm.eps).sqrt()
    shift = folded if folded is not None else torch.zeros_like(mean)
    if not refit_norms:
        _own_statistics(norm, solution, mean - shift, std, shift)
        return
    fitted_var = (solution.fitted_square - solution.fitted_mean.square()).clamp_min(0)
    target_var = (solution.target_square - solution.target_mean.square()).clamp_min(0)
    usable = (fitted_var > 1e-12 * target_var.mean().clamp_min(1e-30)) & (target_var > 0)
    ratio = torch.where(usable, (fitted_var / target_var.clamp_min(1e-30)).sqrt(), torch.ones_like(std))
    new_std = std * ratio
    new_mean = solution.fitted_mean - shift - (solution.target_mean - mean) * ratio
    norm.running_mean.copy_(new_mean)
    norm.running_var.copy_((new_std.square() - norm.eps).clamp_min(0))


def _own_statistics(norm: nn.Module, solution: Solution, centre: torch.Tensor, std: torch.Tensor,
                    shift: torch.Tensor) -> None:
    """Running statistics set to the refitted output's own moments, the affine compensating.

    In eval mode the norm must compute γ·(z − centre)/std + β. With the statistics of z itself
    (mean m, variance v over the calibration images and copies) and γ' = γ·√(v + ε)/std,
    β' = β + γ·(m − centre)/std it computes exactly that, and training mode, which normalises
    by the batch's own statistics, starts where eval mode is instead of jumping away.
    Without affine parameters only the centre is set.
    """
    if not norm.affine or parametrize.is_parametrized(norm):
        norm.running_mean.copy_(centre)
        return
    own_mean = solution.fitted_mean - shift
    own_var = (solution.fitted_square - solution.fitted_mean.square()).clamp_min(0)
    own_std = (own_var + norm.eps).sqrt()
    gamma, beta = norm.weight.detach().double(), norm.bias.detach().double()
    norm.weight.copy_(gamma * own_std / std)
    norm.bias.copy_(beta + gamma * (own_mean - centre) / std)
    norm.running_mean.copy_(own_mean)
    norm.running_var.copy_(own_var)
