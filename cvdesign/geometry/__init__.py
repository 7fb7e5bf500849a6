"""Reference geometry on coordinate arrays: values and analytic gradients of descriptors.

Everything here is plain numpy in float64, vectorized over frames: slow
enough to be obviously right, fast enough for evaluating a spec or checking a
simulation engine frame by frame. Coordinates are in nm, angles in rad.

Kinds: :func:`distances`, :func:`angles`, :func:`dihedrals` (one value per
index tuple), :func:`center_distance` (distance between the centers of two
groups) and :func:`coordination` (a sum of :func:`switching_function` over
the atom pairs of two groups).

Periodic boxes are given either as orthorhombic edge lengths or as box
vectors (rows), and the minimum image is exact for any non-singular box (see
:func:`minimum_image`).

Gradients
---------
Every function takes ``gradient=False``; with ``gradient=True`` it returns
``(values, gradient)``, the gradient with respect to the positions of the
atoms involved only:

- tuple kinds: shape (n_frames, n_items, n_atoms_per_item, 3), entry
  ``[f, i, a]`` for atom ``indices[i][a]``;
- group kinds (one item per call): shape (n_frames, n_a + n_b, 3), row k for
  atom ``concatenate([group_a, group_b])[k]``.

With a box the gradient is taken with respect to the minimum images used
(the image shift is constant where it does not change), which is what an
engine applies. Where a quantity is not differentiable or its direction is
undefined (coincident atoms, collinear angle or dihedral atoms) the gradient
is set to 0 and a :class:`GeometryWarning` says where; values stay finite.

Modules
-------
:mod:`.box` (periodic boxes, minimum image, box heights), :mod:`.internal`
(distances, angles, dihedrals), :mod:`.groups` (group centers, center
displacement and distance, whole groups), :mod:`.contacts` (switching
function, coordination numbers), :mod:`.alignment` (orientation, Kabsch
rotations); every public name is importable from :mod:`cvdesign.geometry`.
"""

from ._checks import GeometryWarning, recorded_geometry_warnings
from .alignment import defines_orientation, kabsch_rotation
from .box import box_heights, minimum_image
from .contacts import MAX_SWITCH_EXPONENT, coordination, coordination_pairs, switching_function
from .groups import center_displacement, center_distance, group_centers, whole_groups
from .internal import angles, dihedrals, distances

__all__ = ["GeometryWarning", "recorded_geometry_warnings", "minimum_image", "distances", "angles", "dihedrals",
           "group_centers", "center_displacement", "whole_groups", "box_heights",
           "defines_orientation", "kabsch_rotation", "center_distance", "coordination",
           "coordination_pairs", "switching_function", "MAX_SWITCH_EXPONENT"]
