"""Reference geometry on coordinate arrays: distances, angles, dihedrals.

Everything here is plain numpy in float64: slow enough to be obviously right,
fast enough for evaluating a spec or checking a simulation engine frame by
frame. Coordinates are in nm, angles in rad.

Periodic boxes are given either as orthorhombic edge lengths or as box
vectors (rows), and the minimum image is exact for any non-singular box (see
:func:`minimum_image`).

Layout, with gradients in mind
------------------------------
Each public function works in two steps: :func:`_bond_vectors` gathers the
atoms of every index tuple and forms the minimum-image bond vectors
``b_j = x[j + 1] - x[j]`` once; a small ``_*_from_bonds`` function turns those
vectors into values. Analytic gradients (a later addition) can reuse the same
bond vectors and chain back to atoms with ``d b_j / d x[j + 1] = +1``,
``d b_j / d x[j] = -1``.
"""

import itertools
import warnings

import numpy as np

from .errors import InputError

__all__ = ["GeometryWarning", "minimum_image", "distances", "angles", "dihedrals"]

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


def _warn_singular(mask, idx, what, reason, substitute, name):
    count = int(mask.sum())
    frame, row = (int(v) for v in np.argwhere(mask)[0])
    warnings.warn(
        f"{what}: {count} of {mask.size} values are undefined ({reason}); they were "
        f"set to {substitute}. First: frame {frame}, "
        f"{name}[{row}] = atoms {idx[row].tolist()}",
        GeometryWarning,
        stacklevel=3,
    )


# --------------------------------------------------------------------------
# values from bond vectors


def _norm(v):
    return np.sqrt(np.einsum("...k,...k->...", v, v))


def _distance_from_bonds(bonds):
    """(n_frames, n, 1, 3) bond vectors -> (n_frames, n) lengths in nm."""
    return _norm(bonds[:, :, 0, :])


def _angle_from_bonds(bonds):
    """(n_frames, n, 2, 3) bond vectors -> (angles in rad, singular mask)."""
    u = -bonds[:, :, 0, :]  # from the middle atom to the first
    v = bonds[:, :, 1, :]  # from the middle atom to the third
    sine = _norm(np.cross(u, v))
    cosine = np.einsum("...k,...k->...", u, v)
    value = np.arctan2(sine, cosine)
    singular = (_norm(u) < _TINY_LENGTH) | (_norm(v) < _TINY_LENGTH)
    value[singular] = np.pi / 2
    return value, singular


def _dihedral_from_bonds(bonds):
    """(n_frames, n, 3, 3) bond vectors -> (dihedrals in rad, singular mask)."""
    b0, b1, b2 = bonds[:, :, 0, :], bonds[:, :, 1, :], bonds[:, :, 2, :]
    n1 = np.cross(b0, b1)
    n2 = np.cross(b1, b2)
    len0, len1, len2 = _norm(b0), _norm(b1), _norm(b2)
    y = len1 * np.einsum("...k,...k->...", b0, n2)
    x = np.einsum("...k,...k->...", n1, n2)
    value = np.arctan2(y, x)
    value[value <= -np.pi] = np.pi  # the range is (-pi, pi]
    singular = (
        (np.minimum(np.minimum(len0, len1), len2) < _TINY_LENGTH)
        | (_norm(n1) <= _TINY_SINE * len0 * len1)
        | (_norm(n2) <= _TINY_SINE * len1 * len2)
    )
    value[singular] = 0.0
    return value + 0.0, singular  # + 0.0 turns -0.0 into 0.0


# --------------------------------------------------------------------------
# public functions


def distances(xyz, pairs, box=None):
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

    Returns
    -------
    ndarray of shape (n_frames, n_pairs), float64
        Minimum-image distances in nm.

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
    >>> distances(xyz, []).shape
    (1, 0)
    """
    idx, bonds = _bond_vectors(xyz, pairs, 2, box, "pairs")
    return _distance_from_bonds(bonds)


def angles(xyz, triples, box=None):
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

    Returns
    -------
    ndarray of shape (n_frames, n_angles), float64
        Angles in rad, in [0, pi]. Computed as ``atan2(|u x v|, u . v)``,
        accurate also near 0 and pi.

    Warns
    -----
    GeometryWarning
        When an arm is shorter than 1e-9 nm (coincident atoms) the angle is
        undefined; it is returned as pi/2. Collinear atoms are not singular
        for the value (0 or pi).

    Examples
    --------
    >>> xyz = np.array([[[1.0, 0.0, 0.0], [0.0, 0.0, 0.0], [0.0, 2.0, 0.0]]])
    >>> angles(xyz, [[0, 1, 2]]) / np.pi
    array([[0.5]])
    """
    idx, bonds = _bond_vectors(xyz, triples, 3, box, "triples")
    value, singular = _angle_from_bonds(bonds)
    if np.any(singular):
        _warn_singular(singular, idx, "angles", "an arm has zero length", "pi/2", "triples")
    return value


def dihedrals(xyz, quads, box=None):
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

    Returns
    -------
    ndarray of shape (n_frames, n_dihedrals), float64
        Dihedral angles in rad, in (-pi, pi]: cis (a and d eclipsed) is 0,
        trans is pi.

    Warns
    -----
    GeometryWarning
        When a, b, c or b, c, d are collinear (sine of the bond angle below
        1e-9) or two consecutive atoms coincide, the dihedral is undefined;
        it is returned as 0.

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

    Examples
    --------
    Atom b at the origin, c on +z, a on +x and d turned by +60 degrees
    (from +x towards +y, clockwise as seen looking from b towards c):

    >>> s = np.sqrt(3) / 2
    >>> xyz = np.array([[[1, 0, 0], [0, 0, 0], [0, 0, 1], [0.5, s, 1]]])
    >>> np.degrees(dihedrals(xyz, [[0, 1, 2, 3]])).round(6)
    array([[60.]])
    """
    idx, bonds = _bond_vectors(xyz, quads, 4, box, "quads")
    value, singular = _dihedral_from_bonds(bonds)
    if np.any(singular):
        _warn_singular(singular, idx, "dihedrals", "collinear or coincident atoms", "0", "quads")
    return value
