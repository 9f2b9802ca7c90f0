"""Converting two torchvision backbones gives bitwise the results the code gave before the package moved.

A regression fingerprint, not an outside reference: the digests below were computed by the code at
commit fef4e05 (the flat package, before it was reorganised by pipeline stage) with this very
procedure. A change that alters any converted weight, buffer or output by one bit fails here; a
deliberate change of conversion results must recompute them and say why in its commit.
"""

from __future__ import annotations

import hashlib

import pytest
import torch

import orbify

torchvision = pytest.importorskip("torchvision")

#: architecture -> (input size, digest of the converted state dict, digest of the outputs on two inputs)
EXPECTED = {
    "resnet18": (33, "7e6e8fe2ae7f65f36b57b85f6204e3e7c66011031edcbecc9ac66a3f3cd33929",
                 "4d35c74563dc8fa1a651ceba603ffcc31c89f2f40188553af64e46561b8c40f1"),
    "mobilenet_v2": (33, "7429155b478596eebaa95aabb098c1cffa56ee34d5641b610e6d1afce5f3efc2",
                     "9b9d25e8e7f7977144f6856d5456d9ad0c8047c3ffa610283a894c742530ff64"),
}


def digest(named: list[tuple[str, torch.Tensor]]) -> str:
    """sha256 over names, dtypes, shapes and raw bytes, in the given order."""
    h = hashlib.sha256()
    for name, tensor in named:
        tensor = tensor.detach().contiguous().cpu()
        h.update(name.encode())
        h.update(str(tensor.dtype).encode())
        h.update(str(tuple(tensor.shape)).encode())
        h.update(tensor.reshape(-1).view(torch.uint8).numpy().tobytes())
    return h.hexdigest()


@pytest.mark.parametrize("arch", sorted(EXPECTED))
def test_d4_conversion_is_bitwise_unchanged(arch):
    size, state_digest, output_digest = EXPECTED[arch]
    threads = torch.get_num_threads()
    torch.set_num_threads(1)   # float sums in a fixed order: the digests were taken single-threaded
    try:
        torch.manual_seed(0)
        model = getattr(torchvision.models, arch)().eval()
        assert orbify.safe_sizes(model, 40, count=1) == [size]
        x = torch.randn(2, 3, size, size)
        converted, _ = orbify.convert(model, "d4", example_input=x[:1])
        with torch.no_grad():
            y = converted(x)
    finally:
        torch.set_num_threads(threads)
    assert digest(sorted(converted.state_dict().items())) == state_digest
    assert digest([("out", y)]) == output_digest
