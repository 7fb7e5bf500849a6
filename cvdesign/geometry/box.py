"""Periodic boxes: parsing, reduction, the exact minimum image, box heights.

Boxes are given either as orthorhombic edge lengths or as box vectors (rows),
in nm, one for all frames or one per frame; the minimum image is exact for any
non-singular box (see :func:`minimum_image`).
"""

import itertools

import numpy as np

from ..errors import InputError

__all__ = ["minimum_image", "box_heights"]


# The widest image search a skewed box may ask for, in images per axis.
_MAX_IMAGE_RANGE = 20


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
