"""Orientation of point sets: whether points fix one, and Kabsch rotations onto a reference."""

import numpy as np

from ..errors import InputError

__all__ = ["defines_orientation", "kabsch_rotation"]


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
