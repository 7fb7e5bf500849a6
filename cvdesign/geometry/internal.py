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

Layout
------
Tuple kinds work in two steps: :func:`_bond_vectors` gathers the atoms of
every index tuple and forms the minimum-image bond vectors
``b_j = x[j + 1] - x[j]`` once; a small ``_*_from_bonds`` function turns those
vectors into values and, on request, gradients with respect to the bonds,
chained back to the atoms with ``d b_j / d x[j + 1] = +1``,
``d b_j / d x[j] = -1``.
"""

import itertools
import math
import warnings

import numpy as np

from ..errors import InputError

__all__ = [
    "GeometryWarning",
    "minimum_image",
    "distances",
    "angles",
    "dihedrals",
    "group_centers",
    "center_displacement",
    "whole_groups",
    "box_heights",
    "defines_orientation",
    "kabsch_rotation",
    "center_distance",
    "coordination",
    "coordination_pairs",
    "switching_function",
    "MAX_SWITCH_EXPONENT",
]

# An arm shorter than this (nm) counts as two coincident atoms.
_TINY_LENGTH = 1e-9
# Three atoms count as collinear when the sine of their bond angle is below this.
_TINY_SINE = 1e-9
# The widest image search a skewed box may ask for, in images per axis.
_MAX_IMAGE_RANGE = 20


class GeometryWarning(UserWarning):
    """A geometric quantity is undefined for some frames and was given a fixed value.

    Raised through :func:`warnings.warn` by :func:`angles` (an arm of zero
    length) and :func:`dihedrals` (three consecutive atoms collinear or two
    coincident). The returned values stay finite; the warning says which
    value was substituted and where.

    Examples
    --------
    >>> import warnings
    >>> xyz = np.zeros((1, 3, 3))
    >>> with warnings.catch_warnings(record=True) as caught:
    ...     warnings.simplefilter("always")
    ...     value = angles(xyz, [[0, 1, 2]])
    >>> caught[0].category.__name__, float(value[0, 0]) == np.pi / 2
    ('GeometryWarning', True)
    """


# --------------------------------------------------------------------------
# periodic boxes


def _parse_box(box, n_frames, name="box"):
    """Validate `box`; return ``(None, None)``, ``("ortho", L)`` or ``("vectors", B)``.

    ``L`` has shape (n, 3) and ``B`` shape (n, 3, 3), float64, where n is 1
    (one box for every frame) or `n_frames`. `n_frames` is None when the
    caller's array has no frame axis.
    """
    if box is None:
        return None, None
    try:
        arr = np.asarray(box, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(
            f"{name} must be a numeric array of box lengths or box vectors in nm; "
            f"could not convert it ({exc})"
        ) from None
    shape = arr.shape
    if shape == (3,):
        kind, arr = "ortho", arr[None, :]
    elif shape == (3, 3):
        upper = arr[np.triu_indices(3, 1)]
        if n_frames == 3 and np.any(upper != 0):
            raise InputError(
                f"{name} of shape (3, 3) is ambiguous for 3 frames: it could be box "
                "vectors (rows) or per-frame orthorhombic lengths; pass box vectors "
                "with a frame axis, shape (3, 3, 3), or lengths as box vectors with "
                "np.eye(3) * lengths[:, None, :]"
            )
        kind, arr = "vectors", arr[None, :, :]
    elif arr.ndim == 2 and shape[1] == 3:
        kind = "ortho"
    elif arr.ndim == 3 and shape[1:] == (3, 3):
        kind = "vectors"
    else:
        raise InputError(
            f"{name} has shape {shape}; expected orthorhombic lengths (3,) or "
            "(n_frames, 3), or box vectors as rows (3, 3) or (n_frames, 3, 3), in nm"
        )
    per_frame = len(shape) == 3 or (len(shape) == 2 and shape != (3, 3))
    if per_frame and (n_frames is None or arr.shape[0] != n_frames):
        have = "no frame axis" if n_frames is None else f"{n_frames} frames"
        raise InputError(
            f"{name} has {arr.shape[0]} frames (shape {shape}) but the coordinates "
            f"have {have}; give one box per frame, or a single box of shape (3,) or (3, 3)"
        )
    if not np.all(np.isfinite(arr)):
        frame = int(np.argwhere(~np.isfinite(arr))[0, 0])
        raise InputError(f"{name} contains NaN or infinity (frame {frame}); give finite box sizes in nm")
    if kind == "vectors":
        off_diagonal = arr.copy()
        off_diagonal[:, [0, 1, 2], [0, 1, 2]] = 0.0
        if not np.any(off_diagonal):
            kind, arr = "ortho", np.abs(arr[:, [0, 1, 2], [0, 1, 2]])
    if kind == "ortho":
        if np.any(arr <= 0):
            frame = int(np.argwhere(arr <= 0)[0, 0])
            raise InputError(
                f"{name} has a box length <= 0 in frame {frame} ({arr[frame].tolist()} nm); "
                "box lengths must be positive"
            )
        return kind, arr
    det = np.abs(np.linalg.det(arr))
    scale = np.prod(np.linalg.norm(arr, axis=2), axis=1)
    singular = ~(det > 1e-12 * scale)
    if np.any(singular):
        frame = int(np.flatnonzero(singular)[0])
        raise InputError(
            f"{name}: the box vectors of frame {frame} are (nearly) linearly dependent "
            f"({arr[frame].tolist()} nm); give three independent box vectors as rows"
        )
    return kind, arr


def _reduce_box(box_vectors):
    """Shorter box vectors spanning the same lattice, for (n, 3, 3) rows.

    Pairwise reduction: subtract the nearest integer multiple of one vector
    from another while that shortens it, until no pair improves. Every step
    strictly shortens a vector of a discrete lattice, so this terminates; the
    periodic images, and so every minimum image, are unchanged.
    """
    reduced = box_vectors.copy()
    for _ in range(1000):
        changed = False
        for i, j in itertools.permutations(range(3), 2):
            bi, bj = reduced[:, i, :], reduced[:, j, :]
            mu = np.einsum("fk,fk->f", bj, bi) / np.einsum("fk,fk->f", bi, bi)
            k = np.where(np.abs(mu) > 0.5 + 1e-9, np.round(mu), 0.0)
            if np.any(k):
                reduced[:, j, :] = bj - k[:, None] * bi
                changed = True
        if not changed:
            break
    return reduced


def _minimum_image_vectors(dr, box_vectors):
    """Exact minimum image of `dr` (n, m, 3) for box vectors (n, 3, 3) (rows)."""
    box_vectors = _reduce_box(box_vectors)
    inverse = np.linalg.inv(box_vectors)
    frac = np.einsum("fmj,fjk->fmk", dr, inverse)
    frac -= np.round(frac)
    best = np.einsum("fmj,fjk->fmk", frac, box_vectors)
    best_sq = np.einsum("fmk,fmk->fm", best, best)
    base = best.copy()
    for shift in itertools.product((-1, 0, 1), repeat=3):
        if shift == (0, 0, 0):
            continue
        offset = np.einsum("j,fjk->fk", np.asarray(shift, dtype=np.float64), box_vectors)
        candidate = base + offset[:, None, :]
        candidate_sq = np.einsum("fmk,fmk->fm", candidate, candidate)
        better = candidate_sq < best_sq
        best[better] = candidate[better]
        best_sq[better] = candidate_sq[better]
    # Exactness guard. If a lattice point n were closer to dr than the current
    # best (length r), then |frac_i - n_i| <= r * |column i of inverse|, with
    # |frac_i| <= 1/2. While that bound stays below 2 the search above covered
    # every candidate; otherwise (very skewed boxes) widen the search there.
    column_norms = np.linalg.norm(inverse, axis=1)  # (n, 3): norm over rows j
    reach = 0.5 + np.sqrt(best_sq)[:, :, None] * column_norms[:, None, :] * (1 + 1e-9)
    needs_more = np.any(reach >= 2.0, axis=2)
    if np.any(needs_more):
        frames, items = np.nonzero(needs_more)
        span = np.floor(reach[frames, items]).astype(int).max(axis=0)
        if np.any(span > _MAX_IMAGE_RANGE):
            raise InputError(
                "box: the box vectors are too skewed for an image search of "
                f"{_MAX_IMAGE_RANGE} images per axis; give a reduced box "
                "(shortest equivalent box vectors)"
            )
        sub_frac = frac[frames, items]
        sub_box = box_vectors[frames]
        sub_best = best[frames, items]
        sub_sq = best_sq[frames, items]
        ranges = [range(-int(k), int(k) + 1) for k in span]
        for shift in itertools.product(*ranges):
            candidate = np.einsum("mj,mjk->mk", sub_frac - np.asarray(shift, dtype=np.float64), sub_box)
            candidate_sq = np.einsum("mk,mk->m", candidate, candidate)
            better = candidate_sq < sub_sq
            sub_best[better] = candidate[better]
            sub_sq[better] = candidate_sq[better]
        best[frames, items] = sub_best
    return best


def _apply_minimum_image(dr, kind, box):
    """Minimum image of `dr` (..., 3) for an already parsed box."""
    if kind is None:
        return dr.copy()
    flat = dr.reshape(box.shape[0], -1, 3)
    if kind == "ortho":
        lengths = box[:, None, :]
        out = flat - lengths * np.round(flat / lengths)
    else:
        out = _minimum_image_vectors(flat, box)
    return out.reshape(dr.shape)


def minimum_image(dr, box):
    """Shortest periodic image of displacement vectors.

    Parameters
    ----------
    dr : array-like of shape (n_frames, ..., 3)
        Displacement vectors in nm. The leading axis is the frame axis when
        `box` has one box per frame; with a single box any shape ``(..., 3)``
        works.
    box : array-like or None
        The periodic box in nm, one of

        - None: no periodicity, `dr` is returned unchanged (as float64);
        - orthorhombic edge lengths, shape (3,) or (n_frames, 3);
        - box vectors as rows, shape (3, 3) or (n_frames, 3, 3) (the row
          convention of ``mdtraj.Trajectory.unitcell_vectors``). The usual
          reduced lower-triangular form is expected but not required; any
          non-singular box works.

        A (3, 3) array is read as box vectors. With exactly three frames it
        could also be per-frame lengths; that case is accepted only when the
        matrix is lower-triangular (a table of positive lengths never is) and
        is an error otherwise.

    Returns
    -------
    ndarray of shape dr.shape, float64
        For every vector the shortest vector ``dr + n @ box`` over integer
        triples ``n``, in nm. Ties keep the first image found, so results
        are deterministic.

    Raises
    ------
    InputError
        Wrong shapes, a frame count that does not match `dr`, non-finite
        values, box lengths <= 0, or linearly dependent box vectors.

    Notes
    -----
    Triclinic boxes: the box vectors are first reduced (shortened by
    subtracting integer multiples of each other; the lattice of images is the
    same), `dr` is wrapped in fractional coordinates (into [-1/2, 1/2] along
    each reduced box vector) and the 27 neighbouring images are searched. A
    bound on how far a closer image could lie (from the length found and the
    inverse box) then proves the result exact; where it cannot (strongly
    skewed boxes) a wider search is run for those vectors only. Cost: 27
    passes over the data, O(size of dr).

    Examples
    --------
    Two atoms 0.2 nm apart across the boundary of a 3 nm cubic box:

    >>> minimum_image([[2.9, 0.0, 0.0]], [3.0, 3.0, 3.0]).round(6)
    array([[-0.1,  0. ,  0. ]])
    >>> box = [[3.0, 0.0, 0.0], [1.0, 3.0, 0.0], [0.5, 0.5, 3.0]]
    >>> minimum_image([[2.9, 2.9, 0.0]], box).round(6)
    array([[-1.1, -0.1,  0. ]])
    """
    try:
        arr = np.array(dr, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"dr must be a numeric array of shape (..., 3) in nm; could not convert it ({exc})") from None
    if arr.ndim == 0 or arr.shape[-1] != 3:
        raise InputError(f"dr has shape {arr.shape}; expected displacement vectors of shape (..., 3) in nm")
    n_frames = arr.shape[0] if arr.ndim >= 2 else None
    kind, parsed = _parse_box(box, n_frames)
    return _apply_minimum_image(arr, kind, parsed)


# --------------------------------------------------------------------------
# input checks shared by the descriptor functions


def _check_xyz(xyz, name="xyz"):
    """Return `xyz` as a float64 array of shape (n_frames, n_atoms, 3)."""
    try:
        arr = np.asarray(xyz, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{name} must be a numeric array of shape (n_frames, n_atoms, 3) in nm ({exc})") from None
    if arr.ndim != 3 or arr.shape[2] != 3:
        hint = " (add a frame axis: xyz[None])" if arr.ndim == 2 and arr.shape[-1] == 3 else ""
        raise InputError(f"{name} has shape {arr.shape}; expected (n_frames, n_atoms, 3) in nm{hint}")
    return arr


def _check_indices(indices, width, n_atoms, name):
    """Return `indices` as an int64 array of shape (n, width), checked against `n_atoms`."""
    arr = np.asarray(indices)
    if arr.size == 0:
        return np.zeros((0, width), dtype=np.int64)
    if arr.dtype == bool or not np.issubdtype(arr.dtype, np.integer):
        raise InputError(f"{name} must hold integer atom indices (0-based); got dtype {arr.dtype}")
    if arr.ndim != 2 or arr.shape[1] != width:
        raise InputError(f"{name} has shape {arr.shape}; expected (n, {width}): {width} atom indices per row")
    bad = (arr < 0) | (arr >= n_atoms)
    if np.any(bad):
        row, col = (int(v) for v in np.argwhere(bad)[0])
        raise InputError(
            f"{name}[{row}] = {arr[row].tolist()} refers to atom {int(arr[row, col])}, but "
            f"xyz has {n_atoms} atoms (valid indices 0..{n_atoms - 1})"
        )
    return arr.astype(np.int64)


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


def _first_row(mask):
    """(frame, row) of the first True entry of a (n_frames, n) mask."""
    frame, row = (int(v) for v in np.argwhere(mask)[0])
    return frame, row


def _warn_singular(mask, idx, what, reason, substitute, name):
    count = int(mask.sum())
    frame, row = _first_row(mask)
    warnings.warn(
        f"{what}: {count} of {mask.size} values are undefined ({reason}); they were "
        f"set to {substitute}. First: frame {frame}, "
        f"{name}[{row}] = atoms {idx[row].tolist()}",
        GeometryWarning,
        stacklevel=3,
    )


def _warn_gradient(mask, what, reason, where):
    """Warn that the gradient of some values is undefined and was set to 0.

    `where(row)` describes the item of the first affected row.
    """
    count = int(mask.sum())
    frame, row = _first_row(mask)
    warnings.warn(
        f"{what}: the gradient of {count} of {mask.size} values is undefined ({reason}); "
        f"it was set to 0. First: frame {frame}, {where(row)}",
        GeometryWarning,
        stacklevel=3,
    )


# --------------------------------------------------------------------------
# values and gradients from bond vectors
#
# Gradients are first taken with respect to the bond vectors b_j and then
# chained back to the atoms with d b_j / d x[j + 1] = +1, d b_j / d x[j] = -1.
# With a box, b_j is the minimum image of x[j + 1] - x[j]; the image shift is
# constant where the image does not change, so this is the gradient with
# respect to the displaced images, which is what an engine applies.


def _norm(v):
    return np.sqrt(np.einsum("...k,...k->...", v, v))


def _dot(a, b):
    return np.einsum("...k,...k->...", a, b)


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
    idx, bonds = _bond_vectors(xyz, triples, 3, box, "triples")
    if not gradient:
        value, singular = _angle_from_bonds(bonds)
    else:
        value, singular, grad, collinear = _angle_from_bonds(bonds, gradient=True)
    if np.any(singular):
        substitute = "pi/2 (gradient 0)" if gradient else "pi/2"
        _warn_singular(singular, idx, "angles", "an arm has zero length", substitute, "triples")
    if not gradient:
        return value
    if np.any(collinear):
        _warn_gradient(collinear, "angles", "three collinear atoms, angle 0 or pi",
                       lambda row: f"triples[{row}] = atoms {idx[row].tolist()}")
    return value, grad


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
    idx, bonds = _bond_vectors(xyz, quads, 4, box, "quads")
    if not gradient:
        value, singular = _dihedral_from_bonds(bonds)
    else:
        value, singular, grad = _dihedral_from_bonds(bonds, gradient=True)
    if np.any(singular):
        substitute = "0 (gradient 0)" if gradient else "0"
        _warn_singular(singular, idx, "dihedrals", "collinear or coincident atoms", substitute, "quads")
    return (value, grad) if gradient else value


# --------------------------------------------------------------------------
# group descriptors: centers of groups, coordination numbers


def _check_group(group, n_atoms, name):
    """Return `group` as a non-empty int64 array of distinct atom indices."""
    arr = np.asarray(group)
    if arr.ndim != 1:
        raise InputError(f"{name} has shape {arr.shape}; expected a flat list of 0-based atom indices")
    if arr.size == 0:
        raise InputError(f"{name} is empty; a group needs at least one atom")
    if arr.dtype == bool or not np.issubdtype(arr.dtype, np.integer):
        raise InputError(f"{name} must hold integer atom indices (0-based); got dtype {arr.dtype}")
    bad = (arr < 0) | (arr >= n_atoms)
    if np.any(bad):
        j = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"{name}[{j}] = {int(arr[j])} is not an atom of xyz ({n_atoms} atoms, valid indices 0..{n_atoms - 1})"
        )
    unique, counts = np.unique(arr, return_counts=True)
    if np.any(counts > 1):
        raise InputError(f"{name} lists atom {int(unique[counts > 1][0])} more than once; list each atom once")
    return arr.astype(np.int64)


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


def _group_points(xyz, groups, names):
    """Coordinates of the atoms of each group, checked to be finite."""
    out = []
    for group, name in zip(groups, names):
        points = xyz[:, group, :]
        if not np.all(np.isfinite(points)):
            frame, j = (int(v) for v in np.argwhere(~np.isfinite(points).all(axis=2))[0])
            raise InputError(
                f"xyz has NaN or infinite coordinates in frame {frame}, atom {int(group[j])} "
                f"(used by {name}[{j}]); give finite coordinates in nm"
            )
        out.append(points)
    return out


def _make_whole(points, kind, parsed):
    """(n_frames, n_group, 3) points with the group made whole about its first atom
    (each atom at its minimum image from it)."""
    return points[:, :1, :] + _apply_minimum_image(points - points[:, :1, :], kind, parsed)


def _whole_center(points, weights, kind, parsed):
    """Weighted center of (n_frames, n_group, 3) points, the group made whole first."""
    return np.einsum("fak,a->fk", _make_whole(points, kind, parsed), weights)


def group_centers(xyz, groups, box=None, *, masses=None):
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

    Returns
    -------
    ndarray of shape (n_frames, n_groups, 3)
        nm. Centers are not wrapped into the box.

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
        out[:, k, :] = _whole_center(points, weights, kind, parsed)
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
        (_whole_center(pb, wb, kind, parsed) - _whole_center(pa, wa, kind, parsed))[:, None, :],
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
        out.append(_make_whole(points, kind, parsed))
    return out


def box_heights(box):
    """Heights of a periodic box (distances between opposite faces), nm.

    Computed for the reduced box (shorter box vectors spanning the same
    lattice; see :func:`minimum_image`), so that an unusually skewed choice
    of vectors does not make the heights needlessly small. The smallest
    height of any box is at most the length of the shortest lattice vector,
    so a displacement shorter than half the smallest height is its own
    minimum image: a quantity that must stay well defined under the minimum
    image (a group's extent, a restraint's reach) has to stay below that.

    Parameters
    ----------
    box : array-like
        Orthorhombic edge lengths, shape (3,) or (n_frames, 3), or box
        vectors as rows, shape (3, 3) or (n_frames, 3, 3), nm.

    Returns
    -------
    ndarray of shape (n, 3)
        nm, one row per box (n = 1 for a single box).

    Examples
    --------
    >>> box_heights([3.0, 4.0, 5.0]).tolist()
    [[3.0, 4.0, 5.0]]
    >>> box_heights([[3.0, 0.0, 0.0], [1.0, 3.0, 0.0], [0.0, 0.0, 4.0]]).round(4).tolist()
    [[2.846, 3.0, 4.0]]
    """
    shape = np.shape(box) if box is not None else ()
    per_frame = len(shape) == 3 or (len(shape) == 2 and shape != (3, 3))
    kind, parsed = _parse_box(box, shape[0] if per_frame else None)
    if kind is None:
        raise InputError("box_heights needs a periodic box (lengths or box vectors in nm); got None")
    if kind == "ortho":
        return parsed.copy()
    vectors = _reduce_box(parsed)
    volume = np.abs(np.linalg.det(vectors))
    heights = np.empty((vectors.shape[0], 3))
    for i in range(3):
        j, k = (i + 1) % 3, (i + 2) % 3
        heights[:, i] = volume / np.linalg.norm(np.cross(vectors[:, j], vectors[:, k]), axis=1)
    return heights


#: Points whose second-largest principal spread is below this fraction of the largest lie
#: (nearly) on one line: a rotation about that line is not determined by them.
_LINE_RATIO = 1e-2


def defines_orientation(points):
    """Whether points fix an orientation: at least 3 of them, not (nearly) on one line.

    The test: the second singular value of the centred points is at least
    1/100 of the largest (the points spread at least 1 % as far across their
    main direction as along it; the threshold is our choice).

    Parameters
    ----------
    points : array-like of shape (n, 3)
        nm.

    Returns
    -------
    bool

    Examples
    --------
    >>> defines_orientation([[0, 0, 0], [1.0, 0, 0], [0, 1.0, 0]])
    True
    >>> defines_orientation([[0, 0, 0], [1.0, 0, 0], [2.0, 0, 0]])
    False
    """
    p = np.asarray(points, dtype=np.float64)
    if p.ndim != 2 or p.shape[1] != 3 or p.shape[0] < 3 or not np.all(np.isfinite(p)):
        return False
    with np.errstate(over="ignore", invalid="ignore"):
        scale = np.abs(p).max()
        centred = p / scale - (p / scale).mean(axis=0) if scale > 0 else p
    if not (scale > 0 and np.all(np.isfinite(centred))):
        return False
    s = np.linalg.svd(centred, compute_uv=False)
    return bool(s[0] > 0 and s[1] >= _LINE_RATIO * s[0])


def kabsch_rotation(mobile, reference, *, frame_offset=0):
    """Rotations that best superpose centred point sets onto a reference.

    For every frame f the proper rotation ``R_f`` (determinant +1) that
    minimizes ``sum_i |mobile[f, i] @ R_f - reference[i]|**2`` (points are
    rows), from the singular value decomposition of ``H = mobile[f].T @
    reference = U S V^T``: ``R_f = U diag(1, 1, d) V^T`` with ``d = sign
    det(U V^T)``, which excludes reflections (Kabsch, 1976, Acta Cryst. A32,
    922-923). Both sets must be centred on their geometric centers by the
    caller; the rotation is then about that center.

    Parameters
    ----------
    mobile : array-like of shape (n_frames, n, 3)
        Centred coordinates, nm.
    reference : array-like of shape (n, 3)
        Centred reference coordinates, nm; they must fix an orientation
        (:func:`defines_orientation`).
    frame_offset : int, default=0
        Added to frame numbers in error messages (for callers that pass
        frames in chunks).

    Returns
    -------
    rotation : ndarray of shape (n_frames, 3, 3)
        Apply as ``points @ rotation[f]`` (dimensionless).
    rmsd : ndarray of shape (n_frames,)
        Root mean square deviation from the reference after the fit, nm.

    Raises
    ------
    InputError
        Shapes that do not match, non-finite values, a reference that does
        not fix an orientation, or a frame whose points lie (nearly) on one
        line (naming the frame).

    Examples
    --------
    A triangle turned by 90 degrees about z is turned back:

    >>> ref = np.array([[1.0, 0, 0], [-0.5, 0.8, 0], [-0.5, -0.8, 0]])
    >>> turned = ref @ np.array([[0.0, 1, 0], [-1.0, 0, 0], [0, 0, 1.0]])
    >>> rot, rmsd = kabsch_rotation(turned[None], ref)
    >>> np.allclose(turned @ rot[0], ref), float(rmsd[0]) < 1e-12
    (True, True)
    """
    m = np.asarray(mobile, dtype=np.float64)
    ref = np.asarray(reference, dtype=np.float64)
    if ref.ndim != 2 or ref.shape[1] != 3 or m.ndim != 3 or m.shape[1:] != ref.shape:
        raise InputError(f"kabsch_rotation needs mobile of shape (n_frames, n, 3) and reference of "
                         f"shape (n, 3) with the same n; got {m.shape} and {ref.shape}")
    if not (np.all(np.isfinite(m)) and np.all(np.isfinite(ref))):
        raise InputError("kabsch_rotation: the coordinates contain NaN or infinity; give finite "
                         "coordinates in nm")
    if not defines_orientation(ref):
        raise InputError(f"the reference points ({ref.shape[0]}) do not fix an orientation: they "
                         "are fewer than 3 or lie (nearly) on one line; use more atoms, spread "
                         "in at least two directions")
    h = np.einsum("fai,aj->fij", m, ref)
    u, s, vt = np.linalg.svd(h)
    flat = ~(s[:, 1] >= _LINE_RATIO ** 2 * s[:, 0])
    if np.any(flat):
        frame = int(np.flatnonzero(flat)[0]) + int(frame_offset)
        raise InputError(f"the points of frame {frame} lie (nearly) on one line (or coincide); "
                         "their rotation onto the reference is not determined")
    d = np.sign(np.linalg.det(np.einsum("fij,fjk->fik", u, vt)))
    u[:, :, 2] *= d[:, None]
    rotation = np.einsum("fij,fjk->fik", u, vt)
    diff = np.einsum("faj,fjk->fak", m, rotation) - ref
    rmsd = np.sqrt(np.einsum("fak,fak->f", diff, diff) / ref.shape[0])
    return rotation, rmsd


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


# Exponents of the switching function above this are refused: the function is
# then a step at r0 in double precision, and its series coefficients grow as m^3.
MAX_SWITCH_EXPONENT = 1000.0


def _check_switch_parameters(r0, n, m):
    def number(value, name):
        if isinstance(value, (bool, np.bool_)):
            raise InputError(f"{name} must be a number; got {value!r}")
        try:
            out = float(value)
        except (TypeError, ValueError):
            raise InputError(f"{name} must be a number; got {value!r}") from None
        if not math.isfinite(out):
            raise InputError(f"{name} must be finite; got {value!r}")
        return out

    r0, n, m = number(r0, "r0"), number(n, "n"), number(m, "m")
    if not r0 > 0:
        raise InputError(f"r0={r0!r} must be > 0 (nm)")
    if not 0 < n < m <= MAX_SWITCH_EXPONENT:
        raise InputError(
            f"n={n!r}, m={m!r}: the switching function needs 0 < n < m <= {MAX_SWITCH_EXPONENT:g} "
            "(e.g. the common n=6, m=12)"
        )
    return r0, n, m


# Order of the Taylor series of the switching function around r0, and its
# range: |r/r0 - 1| * max(m, 1) below _SERIES_RANGE.
_SERIES_ORDER = 6
_SERIES_RANGE = 2e-3


def _series_coefficients(k, order=_SERIES_ORDER):
    """Coefficients f_0..f_order of ((1 + e)^k - 1) / (k e) = sum_j f_j e^j.

    ``f_j = binom(k, j + 1) / k``, by the recurrence ``f_j = f_(j-1) (k - j) / (j + 1)``.
    """
    out = [1.0]
    for j in range(1, order + 1):
        out.append(out[-1] * (k - j) / (j + 1))
    return out


def _switch_series(n, m, order=_SERIES_ORDER):
    """Coefficients q_0..q_order of s = (n/m) sum_j q_j e^j, e = r/r0 - 1 (series division)."""
    p, f = _series_coefficients(n, order), _series_coefficients(m, order)
    q = [1.0]
    for j in range(1, order + 1):
        q.append(p[j] - sum(f[i] * q[j - i] for i in range(1, j + 1)))
    return q


def _switch_below(log_x, n, m):
    """g = (1 - x^n) / (1 - x^m) and dg/dlog(x) for log(x) < 0 (x in [0, 1)), by expm1."""
    e_n, e_m = np.expm1(n * log_x), np.expm1(m * log_x)
    g = e_n / e_m
    # exp(k log x) rather than 1 + e_k, which loses the digits of a small x^k
    dg = (n * np.exp(n * log_x) * e_m - m * np.exp(m * log_x) * e_n) / e_m**2
    return g, dg


def switching_function(r, r0, n=6, m=12, *, derivative=False):
    """The rational switching function ``s(r) = (1 - (r/r0)^n) / (1 - (r/r0)^m)``.

    Parameters
    ----------
    r : array-like of float, any shape
        Distances in nm, >= 0.
    r0 : float
        Switching distance in nm, > 0: ``s(r0) = n/m``.
    n, m : float, default=6, 12
        Exponents, positive numbers with ``n < m <= 1000`` (not necessarily
        integers).
    derivative : bool, default=False
        Also return ``ds/dr``.

    Returns
    -------
    s : ndarray of r's shape, float64
        Values in (0, 1]: 1 at r = 0, n/m at r = r0, falling as
        ``(r/r0)^(n - m)`` at large r. Dimensionless.
    ds_dr : ndarray of r's shape, float64
        Only with ``derivative=True``: the derivative in 1/nm. At r = r0 it
        is ``n (n - m) / (2 m r0)``. At r = 0 it is its limit: 0 for n > 1,
        ``-1/r0`` for n = 1, and ``-inf`` for n < 1 (the function has a
        vertical tangent there).

    Raises
    ------
    InputError
        Negative or non-finite `r`, r0 <= 0, or exponents outside
        ``0 < n < m <= 1000``.

    Notes
    -----
    The formula is 0/0 at r = r0. With ``x = r/r0`` it is evaluated as

    - ``expm1(n log x) / expm1(m log x)`` for x < 1, which has no
      cancellation in ``1 - x^k``;
    - ``x^(n - m) (1 - x^-n) / (1 - x^-m)`` for x > 1, the same function
      of ``1/x``, which cannot overflow;
    - a Taylor series in ``e = x - 1`` of order 6 where
      ``|e| max(m, 1) < 2e-3``. With ``((1 + e)^k - 1) / (k e) = sum_j
      f_j(k) e^j``, ``f_j(k) = binom(k, j + 1) / k`` (so ``f_0 = 1``,
      ``f_1 = (k - 1)/2``, ``f_2 = (k - 1)(k - 2)/6``), the function is
      ``s = (n/m) sum_j q_j e^j`` with ``q_0 = 1`` and ``q_j = f_j(n) -
      sum_(i=1..j) f_i(m) q_(j-i)`` (series division); ``q_1 = (n - m)/2``.
      So ``s(r0) = n/m`` exactly and ``s'(r0) = (n/m) q_1 / r0 =
      n (n - m) / (2 m r0)``.

    Accuracy: the direct formulas give the value to about 1e-16 (relative)
    everywhere, but their derivative loses digits near r0 (a cancellation
    of relative size about ``2e-16 / (|n - m| |e|)``, 1e-13 at the edge of
    the series' range for n=6, m=12); the series' truncation error there is
    about ``(|e| max(m, 1))^6``, below 1e-16. Checked against the exact
    formulas in 200-digit decimal arithmetic (tests/test_gradients.py).

    Examples
    --------
    >>> switching_function([0.0, 0.5, 1.0], r0=0.5).round(6)  # 1, 6/12, 63/4095
    array([1.      , 0.5     , 0.015385])
    >>> s, ds = switching_function(0.5, r0=0.5, derivative=True)
    >>> float(s), float(ds)  # n/m and n (n - m) / (2 m r0) = 6 * (-6) / 12
    (0.5, -3.0)
    """
    r0, n, m = _check_switch_parameters(r0, n, m)
    try:
        r = np.array(r, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"r must be a numeric array of distances in nm; could not convert it ({exc})") from None
    if not np.all(np.isfinite(r) & (r >= 0)):
        bad = float(r[~(np.isfinite(r) & (r >= 0))].ravel()[0])
        raise InputError(f"r must hold finite distances >= 0 in nm; got {bad!r}")
    with np.errstate(over="ignore"):
        x = r / r0  # inf for a tiny r0 is handled: s = 0, ds/dr = 0
    eps = x - 1.0
    near = np.abs(eps) * max(m, 1.0) < _SERIES_RANGE
    below = (x < 1.0) & ~near
    above = (x > 1.0) & ~near
    s = np.empty_like(x)
    ds_dlog = np.empty_like(x)  # ds / d log(x), for the direct branches
    with np.errstate(divide="ignore"):
        log_x = np.log(np.where(near, 1.0, x))  # -inf at x = 0, handled by expm1
    if np.any(below):
        g, dg = _switch_below(log_x[below], n, m)
        s[below], ds_dlog[below] = g, dg
    if np.any(above):
        lx = log_x[above]
        g, dg = _switch_below(-lx, n, m)
        power = np.exp((n - m) * lx)
        s[above] = power * g
        ds_dlog[above] = (n - m) * power * g - power * dg
    if np.any(near):
        q = _switch_series(n, m)
        e = eps[near]
        s[near] = (n / m) * np.polynomial.polynomial.polyval(e, q)
    if not derivative:
        return s
    ds = np.empty_like(x)
    direct = below | above
    positive = direct & (r > 0)
    ds[positive] = ds_dlog[positive] / r[positive]
    at_zero = r == 0
    ds[at_zero] = 0.0 if n > 1 else (-1.0 / r0 if n == 1 else -np.inf)
    if np.any(near):
        dq = [j * q[j] for j in range(1, len(q))]
        ds[near] = (n / m) * np.polynomial.polynomial.polyval(e, dq) / r0
    return s, ds


def coordination_pairs(group_a, group_b):
    """The atom pairs a coordination number of two groups counts.

    Parameters
    ----------
    group_a, group_b : array-like of int, shape (n_a,) and (n_b,)
        0-based atom indices, each group without repeats.

    Returns
    -------
    ndarray of shape (n_pairs, 2), int64
        Every pair (i, j) with i in `group_a`, j in `group_b` and i != j,
        each unordered pair once when the groups overlap (the first
        occurrence in the order i over `group_a`, then j over `group_b`,
        is kept), in that order.

    Examples
    --------
    >>> coordination_pairs([0, 1], [1, 2]).tolist()
    [[0, 1], [0, 2], [1, 2]]
    """
    ga = np.asarray(group_a, dtype=np.int64).ravel()
    gb = np.asarray(group_b, dtype=np.int64).ravel()
    return _coordination_positions(ga, gb)[1]


def _coordination_positions(ga, gb):
    """(positions (n_pairs, 2) into concatenate([ga, gb]), atom pairs (n_pairs, 2))."""
    pos_a, pos_b = np.meshgrid(np.arange(len(ga)), np.arange(len(gb)), indexing="ij")
    pos_a, pos_b = pos_a.ravel(), pos_b.ravel()
    atoms_i, atoms_j = ga[pos_a], gb[pos_b]
    keep = atoms_i != atoms_j
    pos_a, pos_b, atoms_i, atoms_j = pos_a[keep], pos_b[keep], atoms_i[keep], atoms_j[keep]
    if np.intersect1d(ga, gb).size:
        keys = np.stack([np.minimum(atoms_i, atoms_j), np.maximum(atoms_i, atoms_j)], axis=1)
        _, first = np.unique(keys, axis=0, return_index=True)
        first = np.sort(first)
        pos_a, pos_b, atoms_i, atoms_j = pos_a[first], pos_b[first], atoms_i[first], atoms_j[first]
    positions = np.stack([pos_a, pos_b + len(ga)], axis=1)
    return positions, np.stack([atoms_i, atoms_j], axis=1)


# Frames per chunk of a coordination number are chosen so that one chunk
# holds at most this many pair distances (bounds memory for large groups).
_PAIRS_PER_CHUNK = 1_000_000


def coordination(xyz, group_a, group_b, r0, box=None, *, n=6, m=12, gradient=False):
    """Coordination number of two atom groups: a sum of switching functions of pair distances.

    ``C = sum over pairs (i, j) of s(r_ij)``, ``s(r) = (1 - (r/r0)^n) / (1 - (r/r0)^m)``
    (the rational switching function, :func:`switching_function`), over the
    pairs of :func:`coordination_pairs`: i in `group_a`, j in `group_b`,
    i != j, each unordered pair once.

    Parameters
    ----------
    xyz : array-like of shape (n_frames, n_atoms, 3)
        Coordinates in nm.
    group_a, group_b : array-like of int, shape (n_a,) and (n_b,)
        0-based atom indices of the two groups; each non-empty, without
        repeats. They may overlap, but must give at least one pair.
    r0 : float
        Switching distance in nm, > 0; a pair at r0 counts n/m.
    box : array-like or None, default=None
        Periodic box in nm; pair distances use the minimum image (see
        :func:`minimum_image`).
    n, m : float, default=6, 12
        Exponents, ``0 < n < m <= 1000``.
    gradient : bool, default=False
        Also return the analytic gradient.

    Returns
    -------
    values : ndarray of shape (n_frames,), float64
        The coordination number (dimensionless).
    gradient : ndarray of shape (n_frames, n_a + n_b, 3), float64
        Only with ``gradient=True``: row k is the derivative (1/nm) with
        respect to the position of atom ``concatenate([group_a,
        group_b])[k]``. For a pair counted once although both atoms are in
        both groups, the derivative goes to the rows of the occurrence
        kept; an atom in both groups has two rows, and its derivative is
        their sum.

    Warns
    -----
    GeometryWarning
        With ``gradient=True``, when the two atoms of a pair coincide
        (closer than 1e-9 nm): the pair counts s(0) = 1 and its gradient,
        whose direction is undefined, is set to 0.

    Raises
    ------
    InputError
        Empty groups or groups without a pair, repeated or out-of-range
        indices, bad r0, n or m, non-finite coordinates, or a bad box.

    Notes
    -----
    Cost O(n_frames n_a n_b); frames are processed in chunks so that memory
    stays near 1e6 pair distances.

    Examples
    --------
    One pair at r0 (counts n/m = 1/2) and one far away:

    >>> xyz = np.array([[[0.0, 0, 0], [0.3, 0, 0], [9.0, 0, 0]]])
    >>> coordination(xyz, [0], [1, 2], r0=0.3).round(6)
    array([0.5])
    >>> value, grad = coordination(xyz, [0], [1, 2], r0=0.3, gradient=True)
    >>> grad[0, :, 0].round(6) + 0.0  # atom 1: n (n - m) / (2 m r0) = -5 per nm
    array([ 5., -5.,  0.])
    """
    r0, n, m = _check_switch_parameters(r0, n, m)
    xyz = _check_xyz(xyz)
    n_frames, n_atoms, _ = xyz.shape
    ga = _check_group(group_a, n_atoms, "group_a")
    gb = _check_group(group_b, n_atoms, "group_b")
    kind, parsed = _parse_box(box, n_frames)
    _group_points(xyz, (ga, gb), ("group_a", "group_b"))
    positions, atom_pairs = _coordination_positions(ga, gb)
    if len(atom_pairs) == 0:
        raise InputError(
            f"group_a {ga.tolist()} and group_b {gb.tolist()} give no pair of distinct atoms; "
            "a coordination number needs at least one pair"
        )
    value = np.empty(n_frames)
    grad = np.zeros((n_frames, len(ga) + len(gb), 3)) if gradient else None
    coincident = np.zeros((n_frames, len(atom_pairs)), dtype=bool) if gradient else None
    step = max(1, _PAIRS_PER_CHUNK // len(atom_pairs))
    for start in range(0, n_frames, step):
        frames = slice(start, min(start + step, n_frames))
        box_part = parsed if (parsed is None or parsed.shape[0] == 1) else parsed[frames]
        dr = xyz[frames][:, atom_pairs[:, 1], :] - xyz[frames][:, atom_pairs[:, 0], :]
        dr = _apply_minimum_image(dr, kind, box_part)
        r = _norm(dr)
        if not gradient:
            value[frames] = switching_function(r, r0, n, m).sum(axis=1)
            continue
        s, ds = switching_function(r, r0, n, m, derivative=True)
        value[frames] = s.sum(axis=1)
        tiny = r < _TINY_LENGTH
        coincident[frames] = tiny
        factor = np.where(tiny, 0.0, ds / np.where(tiny, 1.0, r))
        pair_grad = factor[..., None] * dr  # d s / d x_j; d s / d x_i is its negative
        part = grad[frames]
        np.add.at(part, (slice(None), positions[:, 1]), pair_grad)
        np.add.at(part, (slice(None), positions[:, 0]), -pair_grad)
        grad[frames] = part
    if not gradient:
        return value
    if np.any(coincident):
        _warn_gradient(coincident, "coordination", "two atoms of a pair coincide",
                       lambda row: f"pair of atoms {atom_pairs[row].tolist()}")
    return value, grad
