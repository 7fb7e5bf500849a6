"""Atom groups: centers (each group made whole), center displacement and distance.

A group is made whole by taking every atom at its minimum image from the
group's first atom; :func:`group_centers`, :func:`center_displacement`,
:func:`center_distance` and :func:`whole_groups` all use those images.
"""

import warnings

import numpy as np

from ..errors import InputError
from ._checks import (GeometryWarning, _TINY_LENGTH, _check_group, _check_xyz, _group_points,
                      _norm, _warn_gradient)
from .box import _apply_minimum_image, _parse_box

__all__ = ["group_centers", "center_displacement", "whole_groups", "center_distance"]


def _check_weights(weights, size, name, group_name):
    if weights is None:
        return np.full(size, 1.0 / size)
    try:
        arr = np.asarray(weights, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{name} must be a list of masses in dalton (g/mol); could not convert it ({exc})") from None
    if arr.shape != (size,):
        raise InputError(f"{name} has shape {arr.shape}; expected ({size},), one mass per atom of {group_name}")
    if not np.all(np.isfinite(arr) & (arr > 0)):
        j = int(np.flatnonzero(~(np.isfinite(arr) & (arr > 0)))[0])
        raise InputError(f"{name}[{j}] = {float(arr[j])!r}; masses must be finite and > 0 (dalton)")
    return arr / arr.sum()


def _make_whole(points, kind, parsed, name="group"):
    """(n_frames, n_group, 3) points with the group made whole about its first atom
    (each atom at its minimum image from it); warns when the group comes back cut
    (:func:`_warn_cut`)."""
    shift = _apply_minimum_image(points - points[:, :1, :], kind, parsed)
    if kind is not None and points.shape[1] > 1:
        _warn_cut(shift, kind, parsed, name)
    return points[:, :1, :] + shift


#: How much shorter (nm) than its separation in a group made whole a pair's minimum image
#: must be for the group to count as cut (rounding stays far below it).
_CUT_TOLERANCE_NM = 1e-6


def _warn_cut(shift, kind, parsed, name):
    """Warn (:class:`GeometryWarning`) when a group made whole is cut in some frame: two
    consecutive atoms of the group (in its order) lie farther apart in it than their
    nearest periodic images.

    Making a group whole about its first atom is exact when every atom lies within half
    the smallest box height of that atom. A group reaching farther across the box comes
    back cut: an atom past the boundary of the first atom's cell lands on the opposite
    face, far from its neighbours, and the center may be off. In a compact group every
    separation is its own minimum image, so this never fires for one; groups listed in
    bonded order (a residue's atoms) show a cut between the consecutive atoms that
    straddle it. Cost: one minimum image per atom and frame. Values are not changed."""
    gaps = shift[:, 1:, :] - shift[:, :-1, :]
    nearest = _apply_minimum_image(gaps, kind, parsed)
    cut = (np.einsum("fak,fak->fa", gaps, gaps)
           > (np.sqrt(np.einsum("fak,fak->fa", nearest, nearest)) + _CUT_TOLERANCE_NM) ** 2)
    if np.any(cut):
        # one text per group (no frame numbers or lengths): Python shows a repeated
        # warning once, not once per chunk of a long run
        warnings.warn(
            f"{name}: made whole about its first atom, the group comes back cut in some "
            "frames (two consecutive atoms of it lie farther apart than their nearest "
            "periodic images): it reaches across more than half the smallest box height, "
            "and its center may be off. Use a smaller group (e.g. fewer atoms of a long "
            "residue) or a larger box", GeometryWarning, stacklevel=4)


def _group_name(label, group):
    """``"groups[2] (atoms 4, 5, ..., 19)"``: a group named by its argument and atoms."""
    g = [int(a) for a in group]
    atoms = ", ".join(map(str, g)) if len(g) <= 4 else f"{g[0]}, {g[1]}, ..., {g[-1]}"
    return f"{label} (atoms {atoms})"


def _whole_center(points, weights, kind, parsed, name="group"):
    """Weighted center of (n_frames, n_group, 3) points, the group made whole first."""
    return np.einsum("fak,a->fk", _make_whole(points, kind, parsed, name), weights)


def group_centers(xyz, groups, box=None, *, masses=None, names=None):
    """Center of each atom group per frame, each group made whole first, nm.

    The centers are those :func:`center_distance` and :func:`center_displacement`
    use: each atom is taken at its minimum image from the group's first atom,
    then the (mass-)weighted mean is formed.

    Parameters
    ----------
    xyz : array-like of shape (n_frames, n_atoms, 3)
        nm.
    groups : sequence of sequences of int
        0-based atom indices of each group (non-empty, without repeats).
    box : array-like or None, default=None
        Periodic box in nm; see :func:`minimum_image`.
    masses : sequence of (array-like or None), optional
        Per group, the atom masses in dalton, or None for a geometric
        center; None: all geometric.
    names : sequence of str, optional
        Per group, how a warning names it; None: ``groups[k]`` and its atoms.

    Returns
    -------
    ndarray of shape (n_frames, n_groups, 3)
        nm. Centers are not wrapped into the box.

    Warns
    -----
    GeometryWarning
        When a group, made whole, comes back cut (two consecutive atoms of it
        farther apart than their nearest periodic images: the group reaches
        across more than half the box): its center may be off. The values
        are those computed as usual.

    Examples
    --------
    >>> xyz = np.array([[[0.0, 0, 0], [0.2, 0, 0], [0.6, 0, 0]]])
    >>> group_centers(xyz, [[0, 1], [2]], masses=[[3.0, 1.0], None])[0].round(6)
    array([[0.05, 0.  , 0.  ],
           [0.6 , 0.  , 0.  ]])
    """
    xyz = _check_xyz(xyz)
    n_frames, n_atoms, _ = xyz.shape
    groups = list(groups)
    masses = [None] * len(groups) if masses is None else list(masses)
    if len(masses) != len(groups):
        raise InputError(f"masses has {len(masses)} entries for {len(groups)} groups; give one "
                         "per group (None for a geometric center)")
    kind, parsed = _parse_box(box, n_frames)
    out = np.empty((n_frames, len(groups), 3))
    for k, (group, w) in enumerate(zip(groups, masses)):
        g = _check_group(group, n_atoms, f"groups[{k}]")
        weights = _check_weights(w, len(g), f"masses[{k}]", f"groups[{k}]")
        (points,) = _group_points(xyz, (g,), (f"groups[{k}]",))
        name = names[k] if names is not None else _group_name(f"groups[{k}]", g)
        out[:, k, :] = _whole_center(points, weights, kind, parsed, name)
    return out


def center_displacement(xyz, group_a, group_b, box=None, *, masses_a=None, masses_b=None):
    """Vector from the center of group a to the center of group b, nm.

    Groups are made whole and the vector is the minimum image, as in
    :func:`center_distance`.

    Parameters
    ----------
    xyz : array-like of shape (n_frames, n_atoms, 3)
        nm.
    group_a, group_b : sequence of int
        0-based atom indices.
    box : array-like or None, default=None
        Periodic box in nm; see :func:`minimum_image`.
    masses_a, masses_b : array-like or None, default=None
        Atom masses in dalton; None: geometric centers.

    Returns
    -------
    delta : ndarray of shape (n_frames, 3)
        nm.
    weights_a, weights_b : ndarray
        The normalized weights of each group's atoms: the derivative of
        ``delta`` with respect to atom i of group b is ``weights_b[i]`` times
        the identity, and ``-weights_a[i]`` for group a.

    Examples
    --------
    >>> xyz = np.array([[[0.0, 0, 0], [0.2, 0, 0], [0.6, 0, 0]]])
    >>> center_displacement(xyz, [0, 1], [2])[0].round(6)
    array([[0.5, 0. , 0. ]])
    """
    xyz = _check_xyz(xyz)
    n_frames, n_atoms, _ = xyz.shape
    ga = _check_group(group_a, n_atoms, "group_a")
    gb = _check_group(group_b, n_atoms, "group_b")
    wa = _check_weights(masses_a, len(ga), "masses_a", "group_a")
    wb = _check_weights(masses_b, len(gb), "masses_b", "group_b")
    kind, parsed = _parse_box(box, n_frames)
    pa, pb = _group_points(xyz, (ga, gb), ("group_a", "group_b"))

    delta = _apply_minimum_image(
        (_whole_center(pb, wb, kind, parsed, _group_name("group_b", gb))
         - _whole_center(pa, wa, kind, parsed, _group_name("group_a", ga)))[:, None, :],
        kind, parsed)[:, 0, :]
    return delta, wa, wb


def whole_groups(xyz, groups, box=None):
    """Coordinates of each atom group per frame, every group made whole, nm.

    Each atom is taken at its minimum image from the first atom of its group:
    the same images :func:`group_centers`, :func:`center_displacement` and
    :func:`center_distance` average (one piece of code), so a group split
    across a periodic boundary comes back in one piece. This is exact when
    every atom of a group lies within half the smallest box height (see
    :func:`box_heights`) of the group's first atom.

    Parameters
    ----------
    xyz : array-like of shape (n_frames, n_atoms, 3)
        nm.
    groups : sequence of sequences of int
        0-based atom indices of each group (non-empty, without repeats).
    box : array-like or None, default=None
        Periodic box in nm; see :func:`minimum_image`.

    Returns
    -------
    list of ndarray
        One array of shape (n_frames, len(group), 3) per group, nm, the first
        atom of each group where `xyz` has it.

    Raises
    ------
    InputError
        Bad groups or box, or non-finite coordinates (naming frame and atom).

    Examples
    --------
    Two atoms 0.15 nm apart across the boundary of a 3 nm box:

    >>> xyz = np.array([[[0.1, 0.0, 0.0], [2.95, 0.0, 0.0]]])
    >>> whole_groups(xyz, [[0, 1]], box=[3.0, 3.0, 3.0])[0][0].round(6).tolist()
    [[0.1, 0.0, 0.0], [-0.05, 0.0, 0.0]]
    """
    xyz = _check_xyz(xyz)
    n_frames, n_atoms, _ = xyz.shape
    kind, parsed = _parse_box(box, n_frames)
    out = []
    for k, group in enumerate(groups):
        g = _check_group(group, n_atoms, f"groups[{k}]")
        (points,) = _group_points(xyz, (g,), (f"groups[{k}]",))
        out.append(_make_whole(points, kind, parsed, _group_name(f"groups[{k}]", g)))
    return out


def center_distance(xyz, group_a, group_b, box=None, *, masses_a=None, masses_b=None, gradient=False):
    """Distance between the centers of two atom groups, with an optional periodic box.

    Parameters
    ----------
    xyz : array-like of shape (n_frames, n_atoms, 3)
        Coordinates in nm.
    group_a, group_b : array-like of int, shape (n_a,) and (n_b,)
        0-based atom indices of the two groups; each non-empty, without
        repeats. The groups may share atoms.
    box : array-like or None, default=None
        Periodic box in nm; see :func:`minimum_image`.
    masses_a, masses_b : array-like of shape (n_a,) and (n_b,), or None, default=None
        Atom masses in dalton (g/mol), for the center of mass. None gives
        the geometric center (equal weights) of that group.
    gradient : bool, default=False
        Also return the analytic gradient.

    Returns
    -------
    values : ndarray of shape (n_frames,), float64
        Distance between the two centers in nm.
    gradient : ndarray of shape (n_frames, n_a + n_b, 3), float64
        Only with ``gradient=True``: row k is the derivative (nm/nm) with
        respect to the position of atom ``concatenate([group_a,
        group_b])[k]``: ``-(w_i / W_a) u`` for the atoms of group a and
        ``+(w_i / W_b) u`` for those of group b, ``u`` the unit vector from
        center a to center b. An atom in both groups has two rows; its
        derivative is their sum.

    Warns
    -----
    GeometryWarning
        With ``gradient=True``, when the two centers coincide (closer than
        1e-9 nm): the gradient is set to 0.

    Raises
    ------
    InputError
        Empty groups, repeated or out-of-range indices, bad masses,
        non-finite coordinates, or a bad box.

    Notes
    -----
    Periodic boxes: each group is first made whole relative to its first
    atom (every atom replaced by its minimum image around the first atom of
    its group), the centers are averaged from those images, and the distance
    is the minimum image of center b minus center a. This is exact when
    every atom of a group lies within half the smallest box height of the
    group's first atom, which holds for molecules and binding-site groups
    in any box much larger than them. The gradient is taken with respect to
    the images used, as engines apply it.

    Examples
    --------
    Two atoms around x = 0.1 and one at x = 0.6 (geometric centers):

    >>> xyz = np.array([[[0.0, 0, 0], [0.2, 0, 0], [0.6, 0, 0]]])
    >>> center_distance(xyz, [0, 1], [2]).round(6)
    array([0.5])
    >>> value, grad = center_distance(xyz, [0, 1], [2], masses_a=[3.0, 1.0], gradient=True)
    >>> value.round(6), grad[0, :, 0].round(6)
    (array([0.55]), array([-0.75, -0.25,  1.  ]))
    """
    delta, wa, wb = center_displacement(xyz, group_a, group_b, box, masses_a=masses_a, masses_b=masses_b)
    value = _norm(delta)
    if not gradient:
        return value
    singular = value < _TINY_LENGTH
    safe = np.where(singular, 1.0, value)
    unit = np.where(singular[:, None], 0.0, delta / safe[:, None])
    grad = np.concatenate([-wa[None, :, None] * unit[:, None, :], wb[None, :, None] * unit[:, None, :]], axis=1)
    if np.any(singular):
        _warn_gradient(singular[:, None], "center_distance", "the two centers coincide", lambda row: "the two centers")
    return value, grad
