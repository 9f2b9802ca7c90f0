"""Running modules in a chosen train/eval mode for a while, then putting their mode back."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager

from torch import nn


@contextmanager
def module_mode(*modules: nn.Module, training: bool) -> Iterator[None]:
    """Put every one of ``modules`` in train (``training=True``) or eval mode for the ``with`` block.

    On leaving the block, also after an error, each module gets back the ``training`` flag its top
    module had on entry through ``module.train(flag)``, which sets that flag on every submodule too
    (a submodule whose own flag differed from its parent's is not restored separately).
    Modules are restored in the order given.
    """
    flags = [module.training for module in modules]
    for module in modules:
        module.train(training)
    try:
        yield
    finally:
        for module, flag in zip(modules, flags):
            module.train(flag)
