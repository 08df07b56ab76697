"""Synthetic scenes with analytically known truth, for the demo, the examples and the tests.

Every scene is invented: its lattices, sizes and domain layouts belong to no real
material or measurement.
"""

from .cdw import Scene, cdw_scene, cdw_variant_phases, smooth_partition, stripe_scene, voronoi_labels
from .moire import moire_scene, twisted_bilayer
from .real import (REAL_SCENES, Conditions, bilayer_scene, electronic_types_scene, incommensurate_cdw_scene,
                   real_scene, scan_displacement, supercell_cdw_scene, supercell_geometry)

__all__ = ["Conditions", "REAL_SCENES", "Scene", "bilayer_scene", "cdw_scene", "cdw_variant_phases",
           "electronic_types_scene", "incommensurate_cdw_scene", "moire_scene", "real_scene", "scan_displacement", "smooth_partition",
           "stripe_scene", "supercell_cdw_scene", "supercell_geometry", "twisted_bilayer", "voronoi_labels"]
