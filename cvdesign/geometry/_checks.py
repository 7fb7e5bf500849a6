"""Input checks, warnings and small vector helpers shared by the geometry modules."""

import contextlib
import warnings

import numpy as np

from ..errors import InputError

# An arm shorter than this (nm) counts as two coincident atoms.
_TINY_LENGTH = 1e-9
# Three atoms count as collinear when the sine of their bond angle is below this.
_TINY_SINE = 1e-9


class GeometryWarning(UserWarning):
    """A geometric quantity is undefined for some frames and was given a fixed value.

    Raised through :func:`warnings.warn` by :func:`angles` (an arm of zero
    length) and :func:`dihedrals` (three consecutive atoms collinear or two
    coincident). The returned values stay finite; the warning says which
    value was substituted and where.

    Examples
    --------
    >>> import warnings
    >>> from cvdesign.geometry import angles
    >>> xyz = np.zeros((1, 3, 3))
    >>> with warnings.catch_warnings(record=True) as caught:
    ...     warnings.simplefilter("always")
    ...     value = angles(xyz, [[0, 1, 2]])
    >>> caught[0].category.__name__, float(value[0, 0]) == np.pi / 2
    ('GeometryWarning', True)
    """


@contextlib.contextmanager
def recorded_geometry_warnings():
    """Collect the texts of the :class:`GeometryWarning` s shown in a block, and show them
    as before.

    For a run's written summary: a warning on standard error is gone with the terminal
    (and the command line's ``-q`` hides it). What the warning filters let through is
    seen (Python shows a repeated warning once); each text is kept once, in order.

    Yields
    ------
    list of str
        Filled while the block runs.

    Examples
    --------
    >>> import warnings
    >>> from cvdesign.geometry import angles, recorded_geometry_warnings
    >>> with warnings.catch_warnings(record=True) as caught:
    ...     warnings.simplefilter("always")
    ...     with recorded_geometry_warnings() as seen:
    ...         _ = angles(np.zeros((1, 3, 3)), [[0, 1, 2]])
    >>> len(caught), seen == [str(caught[0].message)]  # shown as before, and recorded
    (1, True)
    """
    seen = []
    with warnings.catch_warnings():
        shown = warnings.showwarning

        def show(message, category, filename, lineno, file=None, line=None):
            if issubclass(category, GeometryWarning) and str(message) not in seen:
                seen.append(str(message))
            shown(message, category, filename, lineno, file, line)

        warnings.showwarning = show
        yield seen


# --------------------------------------------------------------------------
# input checks


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


def _first_row(mask):
    """(frame, row) of the first True entry of a (n_frames, n) mask."""
    frame, row = (int(v) for v in np.argwhere(mask)[0])
    return frame, row


def _warn_singular(mask, idx, what, reason, substitute, name, stacklevel=3):
    count = int(mask.sum())
    frame, row = _first_row(mask)
    warnings.warn(
        f"{what}: {count} of {mask.size} values are undefined ({reason}); they were "
        f"set to {substitute}. First: frame {frame}, "
        f"{name}[{row}] = atoms {idx[row].tolist()}",
        GeometryWarning,
        stacklevel=stacklevel,
    )


def _warn_gradient(mask, what, reason, where, stacklevel=3):
    """Warn that the gradient of some values is undefined and was set to 0.

    `where(row)` describes the item of the first affected row.
    """
    count = int(mask.sum())
    frame, row = _first_row(mask)
    warnings.warn(
        f"{what}: the gradient of {count} of {mask.size} values is undefined ({reason}); "
        f"it was set to 0. First: frame {frame}, {where(row)}",
        GeometryWarning,
        stacklevel=stacklevel,
    )


# --------------------------------------------------------------------------
# vector helpers


def _norm(v):
    return np.sqrt(np.einsum("...k,...k->...", v, v))


def _dot(a, b):
    return np.einsum("...k,...k->...", a, b)


# --------------------------------------------------------------------------
# atom groups


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
