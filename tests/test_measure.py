"""Parameter, MAC and size measurements against published torchvision figures."""

from __future__ import annotations

import pytest
import torch
import torchvision
from torch import nn
from torch.nn.utils import parametrize

from orbify.common.safe_io import save_torch
from orbify.files.sources import load_source
from orbify.verification.measure import count_macs, count_params, state_dict_bytes

# Source: torchvision's published figures, in the metadata of each architecture's default weights
# (torchvision.models.get_model_weights(name).DEFAULT.meta, read without a download): "num_params", and "_ops",
# the GFLOPS column of torchvision's model table, which counts multiply-adds at 224×224, to three decimals.
PUBLISHED = ["resnet18", "resnet50", "vgg11_bn", "mobilenet_v2", "mobilenet_v3_small", "densenet121",
             "efficientnet_b0", "regnet_x_400mf", "squeezenet1_1", "alexnet", "vit_b_16", "vit_b_32"]
PUBLISHED_ROUNDING_GMACS = 0.0005  # half a unit of the third decimal


@pytest.mark.parametrize("name", PUBLISHED)
def test_torchvision_params_and_macs_match_published_figures(name):
    published = torchvision.models.get_model_weights(name).DEFAULT.meta
    model = load_source(f"torchvision:{name}").module
    assert count_params(model) == published["num_params"]
    # shapes are all a count needs: on the meta device no arithmetic is done
    measured = count_macs(model.to("meta"), torch.zeros(1, 3, 224, 224, device="meta")) / 1e9
    assert abs(measured - published["_ops"]) <= PUBLISHED_ROUNDING_GMACS, f"{name}: {measured:.4f} GMACs"


def test_macs_of_a_conv_and_a_linear_layer():
    # Common practice (no source): a conv makes C_out*H_out*W_out*C_in*kh*kw multiply-adds,
    # a linear layer in*out; biases, activations and pooling are not counted.
    model = nn.Sequential(nn.Conv2d(3, 8, 3), nn.ReLU(), nn.Flatten(), nn.Linear(8 * 6 * 6, 5))
    example = torch.zeros(2, 3, 8, 8)
    expected = 2 * (8 * 6 * 6 * 3 * 3 * 3 + 8 * 6 * 6 * 5)
    assert count_macs(model, example) == expected


class _SelfAttention(nn.Module):
    def __init__(self, width: int, heads: int):
        super().__init__()
        self.attention = nn.MultiheadAttention(width, heads, batch_first=True)

    def forward(self, x):
        return self.attention(x, x, x, need_weights=False)[0]


def test_macs_of_multi_head_attention_in_eval_mode():
    # Common practice (no source): self-attention over L tokens of width E makes 4·L·E² multiply-adds in its
    # q, k, v and output projections and 2·L²·E in q·kᵀ and attention·v, whatever the number of heads. In eval mode
    # without gradients torch runs a fused path the counter does not see into; the count must not drop.
    tokens, width = 10, 16
    expected = 4 * tokens * width * width + 2 * tokens * tokens * width
    assert count_macs(_SelfAttention(width, 4).eval(), torch.randn(1, tokens, width)) == expected


def test_count_macs_accepts_several_inputs_and_keeps_the_training_mode():
    class Bilinear(nn.Module):
        def __init__(self):
            super().__init__()
            self.left = nn.Linear(4, 3, bias=False)
            self.right = nn.Linear(6, 3, bias=False)
            self.dropout = nn.Dropout(0.5)

        def forward(self, a, b):
            return self.dropout(self.left(a)) + self.right(b)

    model = Bilinear().train()
    assert count_macs(model, (torch.zeros(1, 4), torch.zeros(1, 6))) == 4 * 3 + 6 * 3
    assert model.training
    assert all(parameter.grad is None for parameter in model.parameters())


class RepeatRows(nn.Module):
    """Expands a (rows, cols) original into a (copies*rows, cols) weight by stacking copies.

    ``right_inverse`` averages the copies, so ``unsafe=True`` is needed (the stored tensor is
    smaller than the weight), as for orbify's tied weights.
    """

    def __init__(self, copies: int):
        super().__init__()
        self.copies = copies

    def forward(self, original: torch.Tensor) -> torch.Tensor:
        return original.repeat(self.copies, *([1] * (original.dim() - 1)))

    def right_inverse(self, weight: torch.Tensor) -> torch.Tensor:
        return weight.reshape(self.copies, -1, *weight.shape[1:]).mean(dim=0)


class MixedByMatmul(nn.Module):
    """Expands a (rows, cols) original into (rows, cols) with a matrix product: a parametrization
    whose expansion itself costs multiply-adds."""

    def __init__(self, rows: int):
        super().__init__()
        self.register_buffer("mixing", torch.eye(rows))

    def forward(self, original: torch.Tensor) -> torch.Tensor:
        return self.mixing @ original


def test_count_params_counts_the_stored_original_of_a_parametrization():
    layer = nn.Linear(6, 8)  # weight 8x6 = 48 values, bias 8
    parametrize.register_parametrization(layer, "weight", RepeatRows(4), unsafe=True)
    assert layer.weight.shape == (8, 6)
    original = layer.parametrizations.weight.original
    assert original.shape == (2, 6)
    assert count_params(layer) == original.numel() + layer.bias.numel() == 12 + 8


def test_count_params_counts_parametrized_modules_inside_a_model():
    model = nn.Sequential(nn.Conv2d(3, 8, 3, bias=False), nn.ReLU(), nn.Conv2d(8, 4, 1, bias=False))
    parametrize.register_parametrization(model[0], "weight", RepeatRows(4), unsafe=True)
    # stored: 2x3x3x3 original of the first conv, 4x8x1x1 weight of the second
    assert count_params(model) == 2 * 3 * 3 * 3 + 4 * 8


def test_count_macs_of_a_parametrized_layer_excludes_the_weight_expansion():
    plain = nn.Linear(5, 7, bias=False)
    tied = nn.Linear(5, 7, bias=False)
    parametrize.register_parametrization(tied, "weight", MixedByMatmul(7))
    example = torch.zeros(3, 5)
    assert count_macs(tied, example) == count_macs(plain, example) == 3 * 5 * 7


def test_state_dict_bytes_is_the_size_of_the_saved_state_dict(tmp_path):
    model = nn.Sequential(nn.Conv2d(3, 8, 3), nn.BatchNorm2d(8))
    path = save_torch(model.state_dict(), tmp_path / "state.pt")
    assert state_dict_bytes(model) == path.stat().st_size
    # float32 values dominate: 8*3*3*3 + 8 conv, 4*8 norm, plus the archive overhead
    values = 8 * 3 * 3 * 3 + 8 + 4 * 8
    assert 4 * values < state_dict_bytes(model) < 4 * values + 8192
