"""Internal coordinates on index tuples: distances, angles and dihedrals, with gradients.

Tuple kinds work in two steps: :func:`_bond_vectors` gathers the atoms of
every index tuple and forms the minimum-image bond vectors
``b_j = x[j + 1] - x[j]`` once; a small ``_*_from_bonds`` function turns those
vectors into values and, on request, gradients with respect to the bonds,
chained back to the atoms with ``d b_j / d x[j + 1] = +1``,
``d b_j / d x[j] = -1``.
"""

import numpy as np

from ..errors import InputError
from ._checks import (_TINY_LENGTH, _TINY_SINE, _check_indices, _check_xyz, _dot, _norm,
                      _warn_gradient, _warn_singular)
from .box import _apply_minimum_image, _parse_box

__all__ = ["distances", "angles", "dihedrals"]


def _bond_vectors(xyz, indices, width, box, name):
    """Minimum-image bond vectors along each index tuple.

    Returns ``(idx, bonds)`` with ``bonds[f, i, j] = x[idx[i, j + 1]] -
    x[idx[i, j]]`` of shape (n_frames, n, width - 1, 3) in nm, each vector
    reduced to its minimum image on its own.
    """
    xyz = _check_xyz(xyz)
    n_frames, n_atoms, _ = xyz.shape
    idx = _check_indices(indices, width, n_atoms, name)
    kind, parsed = _parse_box(box, n_frames)
    points = xyz[:, idx, :]  # (n_frames, n, width, 3)
    if not np.all(np.isfinite(points)):
        frame, row, col = (int(v) for v in np.argwhere(~np.isfinite(points).all(axis=3))[0])
        raise InputError(
            f"xyz has NaN or infinite coordinates in frame {frame}, atom {int(idx[row, col])} "
            f"(used by {name}[{row}]); give finite coordinates in nm"
        )
    bonds = points[:, :, 1:, :] - points[:, :, :-1, :]
    return idx, _apply_minimum_image(bonds, kind, parsed)


# --------------------------------------------------------------------------
# values and gradients from bond vectors
#
# Gradients are first taken with respect to the bond vectors b_j and then
# chained back to the atoms with d b_j / d x[j + 1] = +1, d b_j / d x[j] = -1.
# With a box, b_j is the minimum image of x[j + 1] - x[j]; the image shift is
# constant where the image does not change, so this is the gradient with
# respect to the displaced images, which is what an engine applies.


def _atoms_from_bond_gradient(grad_bonds):
    """(n_frames, n, width - 1, 3) gradient w.r.t. bonds -> (n_frames, n, width, 3) w.r.t. atoms."""
    n_frames, n, n_bonds, _ = grad_bonds.shape
    out = np.zeros((n_frames, n, n_bonds + 1, 3))
    out[:, :, 1:, :] += grad_bonds
    out[:, :, :-1, :] -= grad_bonds
    return out


def _distance_from_bonds(bonds, gradient=False):
    """(n_frames, n, 1, 3) bond vectors -> lengths (n_frames, n) in nm [, gradient, singular mask]."""
    b = bonds[:, :, 0, :]
    value = _norm(b)
    if not gradient:
        return value
    singular = value < _TINY_LENGTH
    safe = np.where(singular, 1.0, value)
    unit = np.where(singular[..., None], 0.0, b / safe[..., None])
    return value, _atoms_from_bond_gradient(unit[:, :, None, :]), singular


def _angle_from_bonds(bonds, gradient=False):
    """(n_frames, n, 2, 3) bond vectors -> (angles in rad, coincident mask[, gradient, collinear mask]).

    With ``u = x0 - x1``, ``v = x2 - x1``, ``w = u x v``:
    ``d theta / d u = (u x w) / (|u|^2 |w|)`` and
    ``d theta / d v = -(v x w) / (|v|^2 |w|)``, both of length ``1/|u|``
    and ``1/|v|`` and perpendicular to their arm, in the plane of the angle.
    """
    u = -bonds[:, :, 0, :]  # from the middle atom to the first
    v = bonds[:, :, 1, :]  # from the middle atom to the third
    w = np.cross(u, v)
    sine = _norm(w)
    cosine = _dot(u, v)
    value = np.arctan2(sine, cosine)
    len_u, len_v = _norm(u), _norm(v)
    singular = (len_u < _TINY_LENGTH) | (len_v < _TINY_LENGTH)
    value[singular] = np.pi / 2
    if not gradient:
        return value, singular
    collinear = ~singular & (sine <= _TINY_SINE * len_u * len_v)
    zero = singular | collinear
    safe_w = np.where(zero, 1.0, sine)[..., None]
    safe_u = np.where(zero, 1.0, len_u)[..., None]
    safe_v = np.where(zero, 1.0, len_v)[..., None]
    d_u = np.cross(u, w) / (safe_u**2 * safe_w)
    d_v = -np.cross(v, w) / (safe_v**2 * safe_w)
    grad = np.stack([-d_u, d_v], axis=2)  # w.r.t. b0 = -u and b1 = v
    grad[zero] = 0.0
    return value, singular, _atoms_from_bond_gradient(grad), collinear


def _dihedral_from_bonds(bonds, gradient=False):
    """(n_frames, n, 3, 3) bond vectors -> (dihedrals in rad, singular mask[, gradient]).

    The gradient follows Blondel and Karplus (J. Comput. Chem. 17, 1132,
    1996): with ``F = x0 - x1``, ``G = x1 - x2``, ``H = x3 - x2``,
    ``A = F x G`` and ``B = H x G`` (here ``A = b0 x b1``, ``B = b1 x b2``)

    - ``d phi / d x0 = -|G| / |A|^2 A``
    - ``d phi / d x3 = +|G| / |B|^2 B``
    - ``d phi / d x1 = |G| / |A|^2 A + (F.G) / (|A|^2 |G|) A - (H.G) / (|B|^2 |G|) B``
    - ``d phi / d x2 = -|G| / |B|^2 B - (F.G) / (|A|^2 |G|) A + (H.G) / (|B|^2 |G|) B``

    No arccos and no division by the sine of the dihedral, so it is stable
    at 0 and pi; it is singular only where the dihedral is (collinear atoms).
    """
    b0, b1, b2 = bonds[:, :, 0, :], bonds[:, :, 1, :], bonds[:, :, 2, :]
    n1 = np.cross(b0, b1)
    n2 = np.cross(b1, b2)
    len0, len1, len2 = _norm(b0), _norm(b1), _norm(b2)
    y = len1 * _dot(b0, n2)
    x = _dot(n1, n2)
    value = np.arctan2(y, x)
    value[value <= -np.pi] = np.pi  # the range is (-pi, pi]
    norm1, norm2 = _norm(n1), _norm(n2)
    singular = (
        (np.minimum(np.minimum(len0, len1), len2) < _TINY_LENGTH)
        | (norm1 <= _TINY_SINE * len0 * len1)
        | (norm2 <= _TINY_SINE * len1 * len2)
    )
    value[singular] = 0.0
    value = value + 0.0  # turns -0.0 into 0.0
    if not gradient:
        return value, singular
    f_vec, g_vec, h_vec = -b0, -b1, b2
    a_sq = np.where(singular, 1.0, norm1**2)[..., None]
    b_sq = np.where(singular, 1.0, norm2**2)[..., None]
    g_len = np.where(singular, 1.0, len1)[..., None]
    a_term = n1 / a_sq  # A / |A|^2
    b_term = n2 / b_sq  # B / |B|^2
    fg = _dot(f_vec, g_vec)[..., None] / g_len
    hg = _dot(h_vec, g_vec)[..., None] / g_len
    d0 = -g_len * a_term
    d3 = g_len * b_term
    d1 = g_len * a_term + fg * a_term - hg * b_term
    d2 = -g_len * b_term - fg * a_term + hg * b_term
    grad = np.stack([d0, d1, d2, d3], axis=2)
    grad[singular] = 0.0
    return value, singular, grad


# --------------------------------------------------------------------------
# public functions: one value per index tuple


def distances(xyz, pairs, box=None, *, gradient=False):
    """Distances between atom pairs, with an optional periodic box.

    Parameters
    ----------
    xyz : array-like of shape (n_frames, n_atoms, 3)
        Coordinates in nm.
    pairs : array-like of int, shape (n_pairs, 2)
        0-based atom indices. An empty sequence gives an empty result.
    box : array-like or None, default=None
        Periodic box in nm; see :func:`minimum_image` for the accepted forms.
        None means no periodicity.
    gradient : bool, default=False
        Also return the analytic gradient.

    Returns
    -------
    values : ndarray of shape (n_frames, n_pairs), float64
        Minimum-image distances in nm.
    gradient : ndarray of shape (n_frames, n_pairs, 2, 3), float64
        Only with ``gradient=True``: ``gradient[f, p, a]`` is the derivative
        of distance p with respect to the position of atom ``pairs[p][a]``
        (dimensionless, nm per nm): the unit vector of the minimum-image
        displacement, with opposite signs for the two atoms.

    Warns
    -----
    GeometryWarning
        With ``gradient=True``, when two atoms coincide (distance below
        1e-9 nm): the direction is undefined and the gradient is set to 0.
        The value (0) is well defined and never warns.

    Raises
    ------
    InputError
        Wrong shapes, non-integer or out-of-range indices, non-finite
        coordinates, or a bad box.

    Examples
    --------
    >>> xyz = np.array([[[0.0, 0.0, 0.0], [0.3, 0.4, 0.0], [2.9, 0.0, 0.0]]])
    >>> distances(xyz, [[0, 1], [0, 2]])
    array([[0.5, 2.9]])
    >>> distances(xyz, [[0, 1], [0, 2]], box=[3.0, 3.0, 3.0])
    array([[0.5, 0.1]])
    >>> value, grad = distances(xyz, [[0, 1]], gradient=True)
    >>> grad[0, 0]  # unit vectors, nm per nm
    array([[-0.6, -0.8,  0. ],
           [ 0.6,  0.8,  0. ]])
    >>> distances(xyz, []).shape
    (1, 0)
    """
    idx, bonds = _bond_vectors(xyz, pairs, 2, box, "pairs")
    if not gradient:
        return _distance_from_bonds(bonds)
    value, grad, singular = _distance_from_bonds(bonds, gradient=True)
    if np.any(singular):
        _warn_gradient(singular, "distances", "coincident atoms",
                       lambda row: f"pairs[{row}] = atoms {idx[row].tolist()}")
    return value, grad


def angles(xyz, triples, box=None, *, gradient=False):
    """Bond angles i-j-k at the middle atom j, with an optional periodic box.

    Parameters
    ----------
    xyz : array-like of shape (n_frames, n_atoms, 3)
        Coordinates in nm.
    triples : array-like of int, shape (n_angles, 3)
        0-based atom indices (i, j, k); the angle is the one at j between
        the vectors j->i and j->k, each taken as its own minimum image.
    box : array-like or None, default=None
        Periodic box in nm; see :func:`minimum_image`.
    gradient : bool, default=False
        Also return the analytic gradient.

    Returns
    -------
    values : ndarray of shape (n_frames, n_angles), float64
        Angles in rad, in [0, pi]. Computed as ``atan2(|u x v|, u . v)``,
        accurate also near 0 and pi.
    gradient : ndarray of shape (n_frames, n_angles, 3, 3), float64
        Only with ``gradient=True``: ``gradient[f, a, t]`` is the derivative
        (rad/nm) of angle a with respect to the position of atom
        ``triples[a][t]``. Computed without arccos and without dividing by
        the sine of the angle (see Notes).

    Warns
    -----
    GeometryWarning
        When an arm is shorter than 1e-9 nm (coincident atoms) the angle is
        undefined; it is returned as pi/2 (and its gradient as 0).
        Collinear atoms (angle 0 or pi) are not singular for the value, but
        the angle is not differentiable there (it behaves like ``|x|``):
        with ``gradient=True`` the gradient is set to 0 and a warning says
        where. Collinear means the sine of the angle is below 1e-9.

    Notes
    -----
    With ``u = x_i - x_j``, ``v = x_k - x_j`` and ``w = u x v``, the
    gradient is ``d theta / d x_i = (u x w) / (|u|^2 |w|)``,
    ``d theta / d x_k = -(v x w) / (|v|^2 |w|)`` and
    ``d theta / d x_j = -(d theta / d x_i + d theta / d x_k)``.

    Examples
    --------
    >>> xyz = np.array([[[1.0, 0.0, 0.0], [0.0, 0.0, 0.0], [0.0, 2.0, 0.0]]])
    >>> angles(xyz, [[0, 1, 2]]) / np.pi
    array([[0.5]])
    >>> value, grad = angles(xyz, [[0, 1, 2]], gradient=True)
    >>> grad[0, 0, 0]  # moving atom i towards -y, away from atom k, opens the angle
    array([ 0., -1.,  0.])
    """
    value, grad, _ = _angles(xyz, triples, box, gradient)
    return value if not gradient else (value, grad)


def _angles(xyz, triples, box, gradient):
    """(values, gradient or None, undefined) of :func:`angles`, with its warnings;
    ``undefined`` (n_frames, n_angles) is True where pi/2 was substituted."""
    idx, bonds = _bond_vectors(xyz, triples, 3, box, "triples")
    if not gradient:
        value, singular = _angle_from_bonds(bonds)
    else:
        value, singular, grad, collinear = _angle_from_bonds(bonds, gradient=True)
    if np.any(singular):
        substitute = "pi/2 (gradient 0)" if gradient else "pi/2"
        _warn_singular(singular, idx, "angles", "an arm has zero length", substitute, "triples",
                       stacklevel=4)
    if not gradient:
        return value, None, singular
    if np.any(collinear):
        _warn_gradient(collinear, "angles", "three collinear atoms, angle 0 or pi",
                       lambda row: f"triples[{row}] = atoms {idx[row].tolist()}", stacklevel=4)
    return value, grad, singular


def dihedrals(xyz, quads, box=None, *, gradient=False):
    """Dihedral (torsion) angles a-b-c-d, IUPAC sign, with an optional periodic box.

    Parameters
    ----------
    xyz : array-like of shape (n_frames, n_atoms, 3)
        Coordinates in nm.
    quads : array-like of int, shape (n_dihedrals, 4)
        0-based atom indices (a, b, c, d); bonds a-b, b-c, c-d are each taken
        as their own minimum image.
    box : array-like or None, default=None
        Periodic box in nm; see :func:`minimum_image`.
    gradient : bool, default=False
        Also return the analytic gradient.

    Returns
    -------
    values : ndarray of shape (n_frames, n_dihedrals), float64
        Dihedral angles in rad, in (-pi, pi]: cis (a and d eclipsed) is 0,
        trans is pi.
    gradient : ndarray of shape (n_frames, n_dihedrals, 4, 3), float64
        Only with ``gradient=True``: ``gradient[f, q, t]`` is the derivative
        (rad/nm) of dihedral q with respect to the position of atom
        ``quads[q][t]``, by the formulas of Blondel and Karplus (1996), which
        need no arccos and stay accurate at 0 and pi. It is smooth across
        the jump of the value at +-pi.

    Warns
    -----
    GeometryWarning
        When a, b, c or b, c, d are collinear (sine of the bond angle below
        1e-9) or two consecutive atoms coincide, the dihedral is undefined;
        it is returned as 0 and its gradient as 0.

    Notes
    -----
    Sign convention (IUPAC-IUB Commission on Biochemical Nomenclature, 1970;
    the same as ``mdtraj.compute_dihedrals``): look along the central bond
    from b towards c, so that bond a-b is in front and bond c-d behind. The
    angle is positive when the front bond a-b must be turned clockwise, by
    less than 180 degrees, to eclipse the rear bond c-d, and negative when it
    must be turned counterclockwise. With ``b0 = b - a``, ``b1 = c - b``,
    ``b2 = d - c`` the value is
    ``atan2(|b1| b0 . (b1 x b2), (b0 x b1) . (b1 x b2))``.

    Gradient (A. Blondel and M. Karplus, J. Comput. Chem. 17, 1132-1141,
    1996): with ``F = a - b``, ``G = b - c``, ``H = d - c``, ``A = F x G``,
    ``B = H x G``, ``d phi / d a = -|G| A / |A|^2``,
    ``d phi / d d = |G| B / |B|^2``, and the middle atoms take the rest so
    that the four derivatives sum to zero (no net force) and carry no net
    torque.

    Examples
    --------
    Atom b at the origin, c on +z, a on +x and d turned by +60 degrees
    (from +x towards +y, clockwise as seen looking from b towards c):

    >>> s = np.sqrt(3) / 2
    >>> xyz = np.array([[[1, 0, 0], [0, 0, 0], [0, 0, 1], [0.5, s, 1]]])
    >>> np.degrees(dihedrals(xyz, [[0, 1, 2, 3]])).round(6)
    array([[60.]])
    >>> value, grad = dihedrals(xyz, [[0, 1, 2, 3]], gradient=True)
    >>> grad.shape, bool(np.abs(grad.sum(axis=2)).max() < 1e-12)  # no net force
    ((1, 1, 4, 3), True)
    """
    value, grad, _ = _dihedrals(xyz, quads, box, gradient)
    return (value, grad) if gradient else value


def _dihedrals(xyz, quads, box, gradient):
    """(values, gradient or None, undefined) of :func:`dihedrals`, with its warning;
    ``undefined`` (n_frames, n_dihedrals) is True where 0 was substituted."""
    idx, bonds = _bond_vectors(xyz, quads, 4, box, "quads")
    if not gradient:
        (value, singular), grad = _dihedral_from_bonds(bonds), None
    else:
        value, singular, grad = _dihedral_from_bonds(bonds, gradient=True)
    if np.any(singular):
        substitute = "0 (gradient 0)" if gradient else "0"
        _warn_singular(singular, idx, "dihedrals", "collinear or coincident atoms", substitute,
                       "quads", stacklevel=4)
    return value, grad, singular
