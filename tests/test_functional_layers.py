"""Functional layer calls on a model's own tensors (orbify.graph.functional_layers): a fused norm-and-activation module
that calls F.batch_norm, and nn.Linear / nn.Conv2d subclasses that call F.linear / F.conv2d, convert exactly as the
same model written with plain torch.nn modules does; timm's models built on them convert exactly."""

from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F
from torch import nn

from orbify import convert, parse_group
from orbify.graph.tracing import trace
from orbify.transfer.recalibrate import recalibrate_batch_norm

SIZE = 9


class NormAct(nn.BatchNorm2d):
    """Batch norm fused with a ReLU, calling the functional form on its own statistics (as some libraries do)."""

    def __init__(self, channels: int):
        super().__init__(channels)
        self.act = nn.ReLU()

    def forward(self, x):
        x = F.batch_norm(x, self.running_mean, self.running_var, self.weight, self.bias, self.training,
                         self.momentum, self.eps)
        return self.act(x)


class OwnConv(nn.Conv2d):
    def forward(self, x):
        return F.conv2d(x, self.weight, self.bias, self.stride, self.padding, self.dilation, self.groups)


class OwnLinear(nn.Linear):
    def forward(self, x):
        return F.linear(x, self.weight, self.bias)


class OwnGroupNorm(nn.GroupNorm):
    def forward(self, x):
        return F.group_norm(x, self.num_groups, self.weight, self.bias, self.eps)


def _pair(seed: int = 0) -> tuple[nn.Module, nn.Module]:
    """The same network twice: with the functional-call modules above, and with plain torch.nn modules."""
    def build(conv, norm_act, group_norm, linear):
        torch.manual_seed(seed)
        return nn.Sequential(conv(1, 16, 3, padding=1), norm_act(16), conv(16, 16, 3, stride=2, padding=1),
                             group_norm(2, 16), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(), linear(16, 3))

    functional = build(OwnConv, NormAct, OwnGroupNorm, OwnLinear)
    for tensor in (functional[1].running_mean, functional[1].running_var, functional[1].weight):
        tensor.data.uniform_(0.5, 1.5)
    plain = build(nn.Conv2d, lambda c: nn.Sequential(nn.BatchNorm2d(c), nn.ReLU()), nn.GroupNorm, nn.Linear)
    plain.load_state_dict(dict(zip(plain.state_dict(), functional.state_dict().values())))   # same order of tensors
    return functional.eval(), plain.eval()


def test_the_traced_graph_calls_plain_modules_holding_the_models_own_tensors():
    functional, _ = _pair()
    gm = trace(functional, torch.zeros(1, 1, SIZE, SIZE))
    called = {type(gm.get_submodule(n.target)) for n in gm.graph.nodes if n.op == "call_module"}
    assert {nn.Conv2d, nn.BatchNorm2d, nn.GroupNorm, nn.Linear} <= called
    assert not [n for n in gm.graph.nodes if n.op in ("call_function", "get_attr") and "norm" in str(n.target)]
    assert not any(isinstance(m, nn.BatchNorm2d) and not hasattr(m, "running_mean") for m in gm.modules())
    x = torch.randn(2, 1, SIZE, SIZE)
    torch.testing.assert_close(gm(x), functional(x), rtol=0, atol=0)    # the same function, bit for bit
    recalibrate_batch_norm(gm, [x])                                     # finds the new norm, and only it


@pytest.mark.parametrize("group", ["c4", "d4"])
def test_functional_calls_convert_as_their_module_forms_do(group):
    functional, plain = _pair()
    example = torch.zeros(1, 1, SIZE, SIZE)
    x = torch.randn(4, 1, SIZE, SIZE, dtype=torch.float64)
    converted, plan = convert(functional, group, example_input=example)
    reference, _ = convert(plain, group, example_input=example)
    converted, reference = converted.double(), reference.double()
    with torch.no_grad():
        torch.testing.assert_close(converted(x), reference(x), rtol=1e-10, atol=1e-12)
        y, g = converted(x), parse_group(group)
        for element in range(g.order):   # invariance, with torch.rot90 / torch.flip moving the input
            assert float((converted(g.act_grid(element, x)) - y).abs().max()) < 1e-10
    assert any("norm" in layer.name for layer in plan.layers)


@pytest.mark.parametrize("name, group", [("efficientnet_b0", "c4"), ("mobilenetv3_large_100", "d4")])
def test_timm_models_with_fused_norms_convert_exactly(name, group):
    timm = pytest.importorskip("timm")     # the test extra installs it
    model = timm.create_model(name, pretrained=False, num_classes=5).eval()   # timm's definition, random weights
    converted, _ = convert(model, group, example_input=torch.zeros(1, 3, 33, 33))
    converted = converted.double()
    x = torch.randn(2, 3, 33, 33, dtype=torch.float64)
    g = parse_group(group)
    with torch.no_grad():
        y = converted(x)
        errors = [float((converted(g.act_grid(e, x)) - y).norm() / y.norm()) for e in range(g.order)]
    assert max(errors) < 1e-9, errors
