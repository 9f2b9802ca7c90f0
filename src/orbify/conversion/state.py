"""What the parts of one conversion share: the module being rewritten, the options, every value's layout and maps."""

from __future__ import annotations

from dataclasses import dataclass, field

from torch import fx, nn

from orbify.graph.plan import ConversionPlan
from orbify.symmetry.groups import Group
from orbify.symmetry.layouts import Layout
from orbify.transfer.channels import ChannelMap


@dataclass
class ConversionState:
    """One conversion in progress.

    ``gm`` is the traced copy being rewritten in place and ``plan`` the record being written.
    ``carry``: the original weights are carried over (False: fresh initialisation); ``matching``:
    channel matching chooses which original channels share an orbit. For every value walked so far,
    ``layouts`` holds its layout, ``maps`` its channel map as carried and ``identity_maps`` its map
    under the identity assignment (the same dict as ``maps`` without matching, where the two agree).
    """

    gm: fx.GraphModule
    group: Group
    budget: str
    init: str
    carry: bool
    matching: bool
    plan: ConversionPlan
    layouts: dict[fx.Node, Layout | None] = field(default_factory=dict)
    maps: dict[fx.Node, ChannelMap] = field(default_factory=dict)
    identity_maps: dict[fx.Node, ChannelMap] = field(init=False)

    def __post_init__(self) -> None:
        self.identity_maps = {} if self.matching else self.maps

    def module(self, node: fx.Node) -> nn.Module:
        """The module a ``call_module`` node calls."""
        return self.gm.get_submodule(node.target)
