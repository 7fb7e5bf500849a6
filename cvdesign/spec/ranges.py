"""The range of a CV: the values it can reach, and where its states sit in that range.

A spec's CV is ``offset + sum_t weight_t (transform_t(d_t) - center_t) / scale_t``.
Each descriptor value ``d`` can take only the values its kind allows
(:func:`descriptor_value_range`): a distance or a distance between group centres
0 nm or more, an angle 0 to pi rad, a dihedral any angle, a coordination number
0 to its number of atom pairs. :func:`reachable_range` bounds the CV from these:

* the terms are grouped by descriptor first, because the terms of one
  descriptor move together: ``a cos(phi) + b sin(phi)`` of one dihedral ranges
  over ``[-sqrt(a^2 + b^2), +sqrt(a^2 + b^2)]``, not over ``[-|a| - |b|,
  |a| + |b|]``; an identity term of a dihedral (the single term of a periodic
  CV) over one period;
* the bounds of the groups add up; a group unbounded on one side (an identity
  term of a distance: no largest distance) leaves the CV unbounded on that side
  (``None``).

**What "reachable" means.** The range is the smallest interval that holds
every value the CV takes when each descriptor may take any value its kind
allows, independently of the others: no geometry of the atoms gives a value
outside it (it is *sound*). Its bounds are the CV's extreme values (attained,
or approached as a limit, e.g. an angle tending to pi) whenever the
descriptors can take their extreme values together, which holds for a single
descriptor and for the internal coordinates of a chain of atoms (bond
distances, bond angles and dihedrals that each place one more atom). When
descriptors share atoms so that they constrain each other (three angles at one
atom, the three distances of a triangle, two dihedrals about one bond and a
third between their outer atoms), the true range can be narrower and the
bounds are not reached. Bounds at distance 0 (two atoms, or every atom pair of
a coordination number, in contact) are sound but far from any physical
structure. A periodic box is not considered: with one, a minimum-image
distance never exceeds half the box diagonal, but the box is not part of the
spec, so identity terms of distances stay unbounded above.

**Folded coordinates.** Near a bound reached at an interior value of the
descriptor (cos(phi) at phi = 0, a combination of cos and sin at its best
angle), the CV changes only to second order with the descriptor: structures
on both sides of the fold give the same value, and the force of a bias along
the CV vanishes there. :func:`states_at_bounds` flags a state whose mean lies
within :data:`FOLD_SPREADS` of its standard deviations of a bound.

Units: the CV's own units throughout; descriptor values in nm, rad or 1.

Examples
--------
A CV of the cos and sin of one dihedral and the cos of another:

>>> descs = [{"id": "phi", "kind": "dihedral"}, {"id": "psi", "kind": "dihedral"}]
>>> terms = [{"descriptor": "phi", "transform": "cos", "center": 0.0, "scale": 1.0, "weight": 3.0},
...          {"descriptor": "phi", "transform": "sin", "center": 0.0, "scale": 1.0, "weight": 4.0},
...          {"descriptor": "psi", "transform": "cos", "center": 0.5, "scale": 0.5, "weight": 1.0}]
>>> reachable_range(descs, terms)  # +-5 from phi, (cos(psi) - 0.5) / 0.5 in [-3, 1]
(-8.0, 6.0)
"""

import math

from ..bias.hints import FOLD_SPREADS, states_at_bounds  # noqa: F401 (re-exported)
from ..constants import TWO_PI

__all__ = ["FOLD_SPREADS", "descriptor_value_range", "reachable_range", "states_at_bounds"]


_INF = math.inf


def _n_pairs(group_a, group_b):
    """Number of atom pairs a coordination number of two groups counts (see
    :func:`cvdesign.geometry.coordination_pairs`): i in a, j in b, i != j, each unordered
    pair once."""
    shared = len(set(group_a) & set(group_b))
    return len(group_a) * len(group_b) - shared - shared * (shared - 1) // 2


def descriptor_value_range(descriptor):
    """The values a descriptor of its kind can take, ``(lowest, highest)``.

    Parameters
    ----------
    descriptor : dict
        A spec descriptor record: ``kind``, and ``groups`` for a coordination.

    Returns
    -------
    (float, float)
        Closure of the set of values: ``(0, inf)`` nm for ``distance`` and
        ``center_distance``, ``(0, pi)`` rad for ``angle``, ``(-pi, pi)`` rad for
        ``dihedral`` (the value -pi itself is reported as +pi), ``(0,
        n_pairs)`` for ``coordination`` (each pair's switching function lies in
        (0, 1]: 1 at contact, tending to 0 far apart).

    Raises
    ------
    ValueError
        An unknown kind.

    Examples
    --------
    >>> descriptor_value_range({"kind": "angle"})
    (0.0, 3.141592653589793)
    >>> descriptor_value_range({"kind": "coordination", "groups": [[0, 1], [1, 2]]})
    (0.0, 3.0)
    """
    kind = descriptor["kind"]
    if kind in ("distance", "center_distance"):
        return 0.0, _INF
    if kind == "angle":
        return 0.0, math.pi
    if kind == "dihedral":
        return -math.pi, math.pi
    if kind == "coordination":
        group_a, group_b = descriptor["groups"]
        return 0.0, float(_n_pairs(group_a, group_b))
    raise ValueError(f"unknown descriptor kind {kind!r}")


def _linear_range(c, lo, hi):
    """Range of ``c x`` for x in [lo, hi] (infinite ends allowed)."""
    if c == 0.0:
        return 0.0, 0.0
    a, b = c * lo, c * hi
    return (a, b) if c > 0 else (b, a)


def _in_interval(angle, lo, hi):
    """Whether `angle` (rad), or an image of it 2 pi apart, lies in [lo, hi]."""
    if hi - lo >= TWO_PI:
        return True
    shifted = lo + math.fmod(angle - lo, TWO_PI)
    if shifted < lo:
        shifted += TWO_PI
    return shifted <= hi


def _trig_range(a, b, lo, hi):
    """Range of ``a cos(x) + b sin(x)`` for x in [lo, hi] (rad, a span of at most 2 pi
    or the whole circle): the ends of the interval and the stationary points
    ``atan2(b, a)`` (value +R) and ``atan2(b, a) + pi`` (value -R), R = hypot(a, b)."""
    amplitude = math.hypot(a, b)
    if amplitude == 0.0:
        return 0.0, 0.0
    ends = [a * math.cos(x) + b * math.sin(x) for x in (lo, hi)]
    peak = math.atan2(b, a)
    low = -amplitude if _in_interval(peak + math.pi, lo, hi) else min(ends)
    high = amplitude if _in_interval(peak, lo, hi) else max(ends)
    return max(low, -amplitude), min(high, amplitude)


def _groups(descriptors, terms):
    """Per descriptor used by the terms, in order of first use: (descriptor, identity
    factor, cos factor, sin factor), and the constant ``-sum weight center / scale``."""
    by_id = {d["id"]: d for d in descriptors}
    factors, constant = {}, 0.0
    for term in terms:
        factor = float(term["weight"]) / float(term["scale"])
        slot = {"identity": 0, "cos": 1, "sin": 2}[term["transform"]]
        row = factors.setdefault(term["descriptor"], [0.0, 0.0, 0.0])
        row[slot] += factor
        constant -= factor * float(term["center"])
    return [(by_id[did], *row) for did, row in factors.items()], constant


def reachable_range(descriptors, terms, offset=0.0):
    """The values a CV can reach, from its terms: ``(lower, upper)``, None where unbounded.

    See the module docstring for what "reachable" means: a sound interval
    (every value of the CV lies in it), whose bounds are the CV's extremes when
    its descriptors can take their extreme values together.

    Parameters
    ----------
    descriptors : list of dict
        Spec descriptor records (``id``, ``kind``; ``groups`` for a
        coordination). Descriptors no term uses are ignored.
    terms : list of dict
        Spec term records (``descriptor``, ``transform``, ``center``,
        ``scale``, ``weight``).
    offset : float, default=0.0
        The CV's offset, CV units.

    Returns
    -------
    lower, upper : float or None
        The bounds in CV units; None on a side where the CV is unbounded (an
        identity term of a distance or a distance between centres, whose
        weight points that way). A periodic CV (one identity term of a
        dihedral) gets the interval of length ``2 pi |weight| / scale`` over
        which its values run.

    Raises
    ------
    KeyError, ValueError
        A term names a descriptor that is not given, or a descriptor has an
        unknown kind (a validated spec has neither).

    Notes
    -----
    Per descriptor the terms reduce to ``c d + a cos(d) + b sin(d)`` plus a
    constant. With only ``a`` and ``b`` (cos and sin of a dihedral) the range is
    ``+-hypot(a, b)``, attained at ``d = atan2(b, a)`` and ``d = atan2(b, a) +
    pi``; on a restricted interval (an angle in [0, pi]) the ends of the
    interval are candidates too. With only ``c``, the range is ``c`` times the
    descriptor's range. The version-1 spec allows no descriptor with both
    (cos and sin only of dihedrals, the identity of a dihedral only alone);
    were there one, the two ranges would be added, which is sound but not tight.

    Examples
    --------
    A distance minus a reference, in units of 0.05 nm: unbounded above.

    >>> reachable_range([{"id": "d", "kind": "distance"}],
    ...                 [{"descriptor": "d", "transform": "identity", "center": 0.3,
    ...                   "scale": 0.05, "weight": 1.0}])
    (-6.0, None)

    A periodic CV, one dihedral in rad, centred on 1 rad:

    >>> low, high = reachable_range([{"id": "phi", "kind": "dihedral"}],
    ...                             [{"descriptor": "phi", "transform": "identity",
    ...                               "center": 1.0, "scale": 1.0, "weight": 1.0}])
    >>> round(low, 6), round(high, 6)  # -pi - 1, pi - 1
    (-4.141593, 2.141593)
    """
    groups, constant = _groups(descriptors, terms)
    lower = upper = float(offset) + constant
    for desc, c, a, b in groups:
        lo, hi = descriptor_value_range(desc)
        c_lo, c_hi = _linear_range(c, lo, hi)
        t_lo, t_hi = _trig_range(a, b, lo, hi)
        lower += c_lo + t_lo
        upper += c_hi + t_hi
    return (lower if math.isfinite(lower) else None,
            upper if math.isfinite(upper) else None)
