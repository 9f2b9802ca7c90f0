"""orbify: turn a trained plain CNN into a rotation-tied (group-equivariant) one."""

from .errors import OrbifyError
from .groups import Group, parse_group
from .layouts import Flat, Orbit, Plain

__version__ = "0.1.0"

__all__ = ["Flat", "Group", "Orbit", "OrbifyError", "Plain", "parse_group", "__version__"]
