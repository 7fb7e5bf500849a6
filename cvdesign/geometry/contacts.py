"""Contacts: coordination numbers of two atom groups through the rational switching function."""

import math

import numpy as np

from ..constants import COORDINATION_EXPONENTS
from ..errors import InputError
from ._checks import _TINY_LENGTH, _check_group, _check_xyz, _group_points, _norm, _warn_gradient
from .box import _apply_minimum_image, _parse_box

__all__ = ["switching_function", "coordination_pairs", "coordination", "MAX_SWITCH_EXPONENT"]


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


def switching_function(r, r0, n=COORDINATION_EXPONENTS[0], m=COORDINATION_EXPONENTS[1], *,
                       derivative=False):
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


def coordination(xyz, group_a, group_b, r0, box=None, *, n=COORDINATION_EXPONENTS[0],
                 m=COORDINATION_EXPONENTS[1], gradient=False):
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
