"""Synthetic scenes with analytically known truth, for the demo, the examples and the tests.

Every scene is invented: its lattices, sizes and domain layouts belong to no real
material or measurement.
"""

from .cdw import Scene, cdw_scene, cdw_variant_phases, smooth_partition, stripe_scene, voronoi_labels
from .moire import moire_scene, twisted_bilayer

__all__ = ["Scene", "cdw_scene", "cdw_variant_phases", "moire_scene", "smooth_partition", "stripe_scene",
           "twisted_bilayer", "voronoi_labels"]
