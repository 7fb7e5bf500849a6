"""Reference geometry on coordinate arrays: values and analytic gradients of descriptors."""

from .internal import (MAX_SWITCH_EXPONENT, GeometryWarning, angles, box_heights, center_displacement,
                       center_distance, coordination, coordination_pairs, defines_orientation,
                       dihedrals, distances, group_centers, kabsch_rotation, minimum_image,
                       switching_function, whole_groups)

__all__ = ["GeometryWarning", "minimum_image", "distances", "angles", "dihedrals",
           "group_centers", "center_displacement", "whole_groups", "box_heights",
           "defines_orientation", "kabsch_rotation", "center_distance", "coordination",
           "coordination_pairs", "switching_function", "MAX_SWITCH_EXPONENT"]
