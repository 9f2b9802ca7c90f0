"""orbify: turn a trained plain CNN into a rotation-tied (group-equivariant) one.

The pipeline, one subpackage per stage (imports go only downwards; DEVELOPERS.md has the table):
source (:mod:`orbify.files`) → graph (:mod:`orbify.graph.tracing`) → plan and converted model
(:mod:`orbify.conversion`, :mod:`orbify.transfer.matching`, :mod:`orbify.calibration`) → report
(:mod:`orbify.verification`) → tuned (:mod:`orbify.tuning`) → exported (:mod:`orbify.files`).
The functions below are the ones a user calls; each docstring has a short example.
"""

from orbify.common.version import __version__
from orbify.conversion.converter import convert
from orbify.data import read_images
from orbify.errors import OrbifyError
from orbify.files.export import export_model
from orbify.files.saving import load, save
from orbify.graph.sizes import safe_sizes
from orbify.layers.bake import bake_model
from orbify.symmetry.groups import Group, parse_group
from orbify.symmetry.layouts import Flat, Orbit, Plain
from orbify.transfer.recalibrate import recalibrate_batch_norm
from orbify.tuning.loop import tune
from orbify.verification.check import check_model

__all__ = [
    "Flat", "Group", "Orbit", "OrbifyError", "Plain", "__version__", "bake_model", "check_model", "convert",
    "export_model", "load", "parse_group", "read_images", "recalibrate_batch_norm", "safe_sizes", "save", "tune",
]
