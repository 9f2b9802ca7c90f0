"""orbify: turn a trained plain CNN into a rotation-tied (group-equivariant) one."""

from .bake import bake_model
from .convert import convert
from .errors import OrbifyError
from .export import export_model
from .groups import Group, parse_group
from .layouts import Flat, Orbit, Plain
from .recalibrate import recalibrate_batch_norm
from .saving import load, save
from .sizes import safe_sizes

__version__ = "0.1.0"

__all__ = ["Flat", "Group", "Orbit", "OrbifyError", "Plain", "convert", "parse_group", "recalibrate_batch_norm",
           "safe_sizes", "__version__"]
__all__ += ["bake_model", "export_model", "load", "save"]
