"""Refining a CV from a biased run: basin labels, crossings, and how two CVs differ.

The refinement loop is: bias along CV 1, feed the biased run back, get CV 2.
This module holds its middle and last steps.

- :func:`label_basins` labels the frames of one biased run by the basins it
  visits, from any per-frame coordinate (the CV of the run, or another one): a
  frame inside a basin core gets that state's name, a frame between cores gets
  None (a transition frame). The labels go straight to
  ``Source.add_labelled(path, labels, bias=...)``; :class:`BasinVisits` also
  reports, per state, the frames and their Kish effective sample size under the
  run's bias, and the number of *crossings* (core-to-core transitions), the
  quantity by which two CVs' biased runs are compared.
- :func:`basins_from_spec` turns a spec's per-state means and spreads into basin
  cores.
- :func:`compare_specs` says how CV 2 differs from CV 1 (terms added, removed
  and kept, cosine of the weight vectors), and :func:`fisher_separation` scores
  any CV on labelled frames (for instance frames neither CV was fitted on).

Units: the coordinate's own (CV units; rad for an angle), kJ/mol, K, ps.
"""

import math
from collections.abc import Mapping
from dataclasses import dataclass
from os import PathLike

import numpy as np

from ..constants import BOLTZMANN_KJ_MOL_K
from ..errors import InputError, SpecError
from ..io.bias import kish_ess
from ..spec import Spec

__all__ = ["BasinCores", "BasinVisits", "SpecComparison", "basins_from_spec", "compare_specs",
           "fisher_separation", "label_basins"]


def _finite_vector(values, name):
    try:
        x = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{name} must be an array of numbers; got {values!r:.80}") from exc
    if x.ndim != 1:
        raise InputError(f"{name} must be one value per frame, shape (n_frames,); got shape "
                         f"{x.shape}; label each run (walker) separately")
    bad = np.flatnonzero(~np.isfinite(x))
    if bad.size:
        raise InputError(f"{name} has a non-finite value at frame {int(bad[0])} "
                         f"({x[bad[0]]!r}); give finite values")
    return x


def _positive(value, name, what):
    """`value` as a float when it is a finite positive number; else an InputError that
    names the argument `name` and says what to give (`what`)."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        v = math.nan
    if not (math.isfinite(v) and v > 0):
        raise InputError(f"{name}={value!r}: {what}")
    return v


def _check_period(period):
    if period is None:
        return None
    return _positive(period, "period", "give the period as a positive length in the "
                     "coordinate's units, or None for a coordinate that is not periodic")


def _as_spec(spec, name, needs):
    """`spec` itself when it has the attributes `needs` (a Spec, or a stand-in), or a Spec
    from a spec dict such as ``suggest(...).specs[0]``, validated by ``Spec.from_dict``;
    anything else is refused naming the argument `name`."""
    if isinstance(spec, Mapping):
        try:
            return Spec.from_dict(spec)
        except SpecError as exc:
            raise InputError(f"{name}: the dict given is not a valid spec ({exc}); give a "
                             "Spec (load_spec) or a spec dict of suggest(...).specs") from exc
    if isinstance(spec, (str, bytes, PathLike)):
        raise InputError(f"{name}={spec!r:.80} is a path or text, not a spec: read the file "
                         "with load_spec(path) first")
    if not all(hasattr(spec, a) for a in needs):
        raise InputError(f"{name} must be a Spec (load_spec) or a spec dict (an entry of "
                         f"suggest(...).specs); got a {type(spec).__name__}")
    return spec


def _inside(values, lo, hi, period):
    """True where a value lies in the core [lo, hi] (upwards along the circle when periodic)."""
    d = np.asarray(values, dtype=np.float64) - lo
    if period is not None:
        d = np.mod(d, period)
    return (d >= 0) & (d <= hi - lo)


def _check_basins(basins, period):
    """{name: (lo, hi)} as floats; refuses empty, reversed, too wide or overlapping cores."""
    if not hasattr(basins, "items") or len(basins) < 2:
        raise InputError(f"basins must map at least two state names to (lo, hi) core intervals; "
                         f"got {basins!r:.120}")
    cores = {}
    for name, interval in basins.items():
        try:
            if isinstance(interval, (str, bytes)):
                raise TypeError("a text is not a pair of numbers")
            lo, hi = (float(v) for v in interval)
        except (TypeError, ValueError) as exc:
            raise InputError(f"basin {name!r}: core {interval!r} must be a pair (lo, hi) of "
                             "numbers") from exc
        if not (math.isfinite(lo) and math.isfinite(hi) and hi > lo):
            raise InputError(f"basin {name!r}: core ({lo!r}, {hi!r}) needs finite lo < hi")
        if period is not None and hi - lo >= period:
            raise InputError(f"basin {name!r}: core ({lo:g}, {hi:g}) is as wide as the period "
                             f"{period:g}; give narrower cores")
        if str(name) in cores:
            raise InputError(f"basins name state {str(name)!r} twice (as {name!r} and another "
                             "key of the same text); give each state one core")
        cores[str(name)] = (lo, hi)
    names = list(cores)
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            (alo, ahi), (blo, bhi) = cores[a], cores[b]
            if period is None:
                overlap = alo <= bhi and blo <= ahi
            else:
                overlap = bool(_inside(blo, alo, ahi, period) or _inside(alo, blo, bhi, period))
            if overlap:
                raise InputError(f"basin cores {a!r} ({alo:g}, {ahi:g}) and {b!r} ({blo:g}, "
                                 f"{bhi:g}) overlap; a frame must lie in one core at most: "
                                 "give narrower cores")
    return cores


def _touching_core(stats, period):
    """The `core` (in spreads) at which two of the cores of `stats` ({state: (mean, std)},
    two or more states) first touch, and which: (limit, what). With a period, cores
    narrower than it follow (the means of two states are at most half a period apart)."""
    best = (math.inf, "")
    names = list(stats)
    for i, a in enumerate(names):
        ma, sa = stats[a]
        for b in names[i + 1:]:
            mb, sb = stats[b]
            gap = abs(ma - mb) if period is None else abs((ma - mb + period / 2) % period
                                                          - period / 2)
            if gap / (sa + sb) < best[0]:
                best = (gap / (sa + sb), f"the basin cores {a!r} and {b!r} overlap (means "
                        f"{gap:g} apart, spreads {sa:g} and {sb:g})")
    return best


def _round_down(x):
    """A round number (two significant digits) at most 0.9 x, x > 0."""
    v = 0.9 * x
    step = 10.0 ** (math.floor(math.log10(v)) - 1)
    return round(math.floor(round(v / step, 9)) * step, 12)


def basins_from_spec(spec, core=1.0):
    """Basin cores of a spec's states: each state's mean ± `core` spreads, in CV units.

    Parameters
    ----------
    spec : cvdesign.Spec or dict
        A spec whose ``states`` hold each state's ``mean`` and ``std`` (every
        spec written by ``suggest`` does), in CV units, with two or more
        states; or a spec document (an entry of ``suggest(...).specs``).
    core : float, default=1.0
        Half width of each core in units of the state's spread. Frames outside
        every core are transition frames; ``1.0`` keeps about two thirds of a
        state's own frames in its core (common practice for core sets).

    Returns
    -------
    BasinCores
        ``{state: (lo, hi)}`` (a dict), CV units, with the spec's ``period`` (None for a CV
        that is not periodic), which :func:`label_basins` uses; checked not to overlap (an
        error names
        the two states and suggests a smaller `core`, a value at most 0.9
        times the one at which the cores touch).

    Raises
    ------
    cvdesign.errors.InputError
        For a `core` that is not a positive number, something that is not a
        spec, a spec with fewer than two states or a state without a positive
        spread, and cores that overlap at this `core` (along the circle for a
        periodic CV).

    Examples
    --------
    >>> from types import SimpleNamespace
    >>> spec = SimpleNamespace(states={"a": {"mean": -1.0, "std": 0.2},
    ...                                "b": {"mean": 1.0, "std": 0.4}})
    >>> basins_from_spec(spec, core=2.0)
    {'a': (-1.4, -0.6), 'b': (0.2, 1.8)}
    >>> basins_from_spec(spec, core=4.0)  # the cores touch at core=2/0.6
    Traceback (most recent call last):
    ...
    cvdesign.errors.InputError: the basin cores 'a' and 'b' overlap (means 2 apart, spreads 0.2 and 0.4) at core=4: give a smaller core=, e.g. core=3 (they touch at core=3.33333)
    """
    spec = _as_spec(spec, "spec", ("states",))
    c = _positive(core, "core", "give a positive number of spreads, e.g. core=1.0")
    period = getattr(spec, "period", None) if getattr(spec, "periodic", False) else None
    p = _check_period(period)
    states = getattr(spec, "states", None) or {}
    if len(states) < 2:
        which = f"one state, {next(iter(states))!r}" if states else "no state"
        raise InputError(f"the spec has {which}: basin cores need two or more states; give "
                         "the cores yourself, label_basins(values, {state: (lo, hi), ...}) "
                         "with a core for each basin the run visits, or use a spec suggested "
                         "from two or more states")
    stats = {}
    for name, st in states.items():
        mean, std = st.get("mean"), st.get("std")
        try:
            m, sd = float(mean), float(std)
        except (TypeError, ValueError):
            m = sd = math.nan
        if not (math.isfinite(m) and math.isfinite(sd) and sd > 0):
            raise InputError(f"state {name!r} of the spec has no finite mean and positive "
                             f"spread (mean={mean!r}, std={std!r}); give the basin cores "
                             "yourself (label_basins(values, {state: (lo, hi)}))")
        stats[str(name)] = (m, sd)
    limit, what = _touching_core(stats, p)
    if c >= limit:
        if limit == 0:
            raise InputError(f"{what}: this CV does not separate them; give the basin cores "
                             "along another coordinate (label_basins(values, {state: "
                             "(lo, hi)}))")
        raise InputError(f"{what} at core={c:g}: give a smaller core=, e.g. "
                         f"core={_round_down(limit):g} (they touch at core={limit:g})")
    return BasinCores(_check_basins({name: (round(m - c * sd, 12), round(m + c * sd, 12))
                                     for name, (m, sd) in stats.items()}, p), period=p)


class BasinCores(dict):
    """``{state: (lo, hi)}`` basin cores (a dict) that carry the CV's `period` (None when
    not periodic), so that :func:`label_basins` wraps them without being told: a periodic
    spec's core at pi, labelled without its period, missed a third of its frames.

    Examples
    --------
    >>> cores = BasinCores({"a": (3.0, 3.3)}, period=6.283185307179586)
    >>> cores, cores.period
    ({'a': (3.0, 3.3)}, 6.283185307179586)
    """

    def __init__(self, cores, *, period=None):
        super().__init__(cores)
        self.period = period


@dataclass(frozen=True)
class BasinVisits:
    """Frames of one run labelled by basin, with per-state counts and the crossings.

    Attributes
    ----------
    labels : ndarray of object, shape (n_frames,)
        State name of each frame in a core, None between cores (transition
        frames): the ``labels`` of ``Source.add_labelled``.
    states : tuple of str
        The basins, in the order given.
    frames : dict of str to int
        Frames in each core.
    ess : dict of str to float
        Kish effective sample size of each core's frames under the weights
        ``exp(V / kT)`` of the run's bias (equal to `frames` without a bias).
    transition_frames : int
        Frames outside every core.
    crossings : int
        Core-to-core transitions: the times the run reaches a core other than
        the last one it was in (a frame that leaves a core and comes back
        counts none).
    crossing_frames : ndarray of int
        The frame at which each crossing reaches its new core.
    duration_ps : float or None
        ``n_frames * timestep_ps`` when a time step was given.
    """

    labels: np.ndarray
    states: tuple
    frames: dict
    ess: dict
    transition_frames: int
    crossings: int
    crossing_frames: np.ndarray
    duration_ps: float | None = None

    @property
    def crossings_per_ns(self):
        """Crossings per ns of run, or None without a time step."""
        if not self.duration_ps:
            return None
        return self.crossings / (self.duration_ps / 1000.0)

    def summary(self):
        """One line: frames and ESS per state, transition frames, crossings."""
        parts = [f"{s}: {self.frames[s]} frames (ESS {self.ess[s]:.0f})" for s in self.states]
        rate = self.crossings_per_ns
        tail = "" if rate is None else f" ({rate:.1f} per ns)"
        return (f"{'; '.join(parts)}; {self.transition_frames} transition frames; "
                f"{self.crossings} crossings{tail}")


def label_basins(values, basins, *, bias=None, temperature=None, period=None,
                 timestep_ps=None):
    """Label the frames of one run by the basin cores they are in; count its crossings.

    Parameters
    ----------
    values : array-like of shape (n_frames,)
        A coordinate per frame, in time order (the CV of a biased run, from
        ``Spec.evaluate``, or any other coordinate), in its own units.
    basins : mapping of str to (float, float)
        ``{state: (lo, hi)}``: the core of each basin, inclusive, in the
        units of `values` (e.g. from :func:`basins_from_spec`). Cores must not
        overlap. With a `period`, ``lo`` to ``hi`` runs upwards along the
        circle and may wrap (``(3.0, 3.5)`` with period ``2 pi`` covers 3.0 to
        pi and -pi to 3.5 - 2 pi).
    bias : array-like of shape (n_frames,), optional
        Bias energy of every frame, kJ/mol: the energy to reweight with (for a
        bias that changed during the run, the bias minus its time-dependent
        offset; see :mod:`cvdesign.io.bias`). Only the effective sample sizes
        use it.
    temperature : float, optional
        Temperature of the run, K; needed with `bias`.
    period : float, optional
        Period of a periodic coordinate (``2 pi`` for a dihedral in rad); by default that
        of `basins` when they come from :func:`basins_from_spec` of a periodic spec
        (:class:`BasinCores`).
    timestep_ps : float, optional
        Time between frames, ps; gives ``duration_ps`` and crossings per ns.

    Returns
    -------
    BasinVisits

    Raises
    ------
    cvdesign.errors.InputError
        For values that are not one finite number per frame, a `bias` of
        another length, a bias without temperature, a `temperature`,
        `timestep_ps` or `period` that is not a positive number, or cores
        that are reversed, overlapping or fewer than two.

    Examples
    --------
    >>> v = [-1.0, -0.2, 1.1, 0.1, 0.9, -1.2, -0.9]
    >>> visits = label_basins(v, {"a": (-1.5, -0.5), "b": (0.5, 1.5)}, timestep_ps=0.5)
    >>> visits.labels.tolist()
    ['a', None, 'b', None, 'b', 'a', 'a']
    >>> visits.crossings, visits.crossing_frames.tolist(), visits.transition_frames
    (2, [2, 5], 2)
    >>> round(visits.crossings_per_ns, 1)  # 2 crossings in 3.5 ps
    571.4
    """
    x = _finite_vector(values, "values")
    if x.size == 0:
        raise InputError("values holds no frame; give the coordinate of every frame of the "
                         "run, in time order")
    own = getattr(basins, "period", None)  # (BasinCores from a periodic spec)
    if period is not None and own is not None and not math.isclose(float(period), own):
        raise InputError(f"period={period!r} but the basin cores come from a spec of period "
                         f"{own!r}; leave period out to use the spec's")
    p = _check_period(own if period is None else period)
    cores = _check_basins(basins, p)
    names = tuple(cores)
    code = np.full(x.size, -1, dtype=np.int64)
    for i, (lo, hi) in enumerate(cores.values()):
        code[_inside(x, lo, hi, p)] = i
    if bias is not None:
        v = _finite_vector(bias, "bias")
        if v.size != x.size:
            raise InputError(f"bias has {v.size} values but values has {x.size} frames; give "
                             "one bias energy (kJ/mol) per frame")
        t = _positive(temperature, "temperature", "a bias needs the positive temperature "
                      "of the run, K (e.g. temperature=300.0)")
        a = v / (BOLTZMANN_KJ_MOL_K * t)
    elif temperature is not None:
        raise InputError("temperature= goes with bias= (the bias energies of the run)")
    dt = None if timestep_ps is None else _positive(
        timestep_ps, "timestep_ps", "give the time between frames as a positive number of "
        "ps, or None")
    frames, ess = {}, {}
    for i, name in enumerate(names):
        inside = code == i
        frames[name] = int(np.count_nonzero(inside))
        if bias is None or not inside.any():
            ess[name] = float(frames[name])
        else:
            ai = a[inside]
            ess[name] = kish_ess(np.exp(ai - ai.max()))
    seen = np.flatnonzero(code >= 0)
    change = seen[1:][np.diff(code[seen]) != 0]
    labels = np.array([names[c] if c >= 0 else None for c in code], dtype=object)
    return BasinVisits(labels=labels, states=names, frames=frames, ess=ess,
                       transition_frames=int(np.count_nonzero(code < 0)),
                       crossings=int(change.size), crossing_frames=change.astype(np.int64),
                       duration_ps=None if dt is None else x.size * dt)


# --------------------------------------------------------------------------
# comparing two CVs


def fisher_separation(values, labels, states, *, weights=None, period=None):
    """Fisher ratio of two states along a coordinate: between- over within-state variance
    with equal state weights, ``((m_a - m_b) / 2)^2 / ((v_a + v_b) / 2)``, the ranking's
    Fisher ratio (:func:`cvdesign.stats.separation.fisher_ratio`; before, this gave twice
    it, ``(m_a - m_b)^2 / (v_a + v_b)``, beside the ranking's held-out J without a word).

    Parameters
    ----------
    values : array-like of shape (n_frames,)
        The coordinate (a CV from ``Spec.evaluate``) per frame.
    labels : array-like of shape (n_frames,)
        State name per frame; frames of other states and None are ignored.
    states : (str, str)
        The two states compared: exactly two (for more states, call it once
        per pair; more are refused, not reduced to the first two).
    weights : array-like of shape (n_frames,), optional
        Frame weights (e.g. ``exp(V / kT)`` of a biased run); equal by default.
    period : float, optional
        Period of a periodic coordinate: means are circular, deviations
        wrapped.

    Returns
    -------
    float
        Dimensionless; larger separates better. The same quantity for two CVs
        on the same frames compares them; on frames neither was fitted on it
        is a held-out score.

    Raises
    ------
    cvdesign.errors.InputError
        For `states` that are not two different names, a state without a
        weighted frame, two states without any spread (the ratio is then
        undefined), and values, labels or weights that do not match.

    Examples
    --------
    >>> fisher_separation([0.0, 2.0, 4.0, 6.0], ["a", "a", "b", "b"], ("a", "b"))  # means 1, 5
    4.0
    """
    if states is None or isinstance(states, (int, float)):
        raise InputError(f"states={states!r} must name the two states compared, e.g. "
                         "('closed', 'open')")
    pair = (states,) if isinstance(states, str) else tuple(states)
    if len(pair) != 2 or pair[0] == pair[1]:
        raise InputError(f"states={states!r:.120} must name two different states (the "
                         f"ratio compares two); got {len(pair)}"
                         + (": call fisher_separation once per pair" if len(pair) > 2 else ""))
    x = _finite_vector(values, "values")
    lab = np.asarray(labels, dtype=object)
    if lab.ndim != 1:
        raise InputError(f"labels has shape {lab.shape}; give one label per frame, a flat "
                         "sequence")
    if lab.size != x.size:
        raise InputError(f"labels has {lab.size} entries but values has {x.size} frames")
    w = np.ones(x.size) if weights is None else _finite_vector(weights, "weights")
    if w.size != x.size or (w < 0).any():
        raise InputError("weights must be one non-negative weight per frame")
    p = _check_period(period)
    means, variances, frozen = [], [], []
    for s in pair:
        inside = np.array([lbl == s for lbl in lab], dtype=bool)
        if not w[inside].sum() > 0:
            raise InputError(f"state {s!r} has no weighted frame among the labels")
        xi, wi = x[inside], w[inside] / w[inside].sum()
        if p is None:
            m = float(wi @ xi)
            d = xi - m
        else:
            z = wi @ np.exp(2j * np.pi * xi / p)
            m = float(np.angle(z) * p / (2 * np.pi))
            d = (xi - m + p / 2) % p - p / 2
            # the mean of the wrapped values (the circular mean's direction is not their
            # mean when a state is skewed): the same ratio as without a period for states
            # away from the cut
            shift = float(wi @ d)
            m, d = m + shift, d - shift
        means.append(m)
        variances.append(float(wi @ d ** 2))
        # one value up to a few single-precision ulps (trajectories store float32; rounding
        # leaves a variance; deviations wrapped for a period, e.g. a torsion at +-pi)
        used = wi > 0
        frozen.append(bool(np.ptp(d[used]) <= 2.0 ** -21 * max(1.0, np.abs(xi[used]).max())))
    gap = means[0] - means[1]
    if p is not None:
        gap = (gap + p / 2) % p - p / 2
    total = variances[0] + variances[1]
    if not total > 0 or all(frozen):
        raise InputError(
            f"states {pair[0]!r} and {pair[1]!r} have no spread along the coordinate (each "
            "holds one value: a single frame each, or a coordinate frozen in both), so their "
            "Fisher ratio is undefined rather than infinite; give more frames per state")
    return 0.5 * gap ** 2 / total


#: Descriptor keys that do not change its value (the rest, e.g. ``r0``, ``weighting``, do).
_NAMING_KEYS = {"id", "kind", "label", "atoms", "groups", "masses", "atom_identities", "periodic"}


def _descriptor_key(d):
    """What a descriptor measures, in one form whatever the order it was written in: a
    distance's two atoms sorted, an angle's and a dihedral's atoms in the smaller of the
    two directions (reversed, they give the same value), a group's atoms sorted (with their
    masses) and the two groups in order; with the parameters that change its value.

    Examples
    --------
    >>> _descriptor_key({"kind": "dihedral", "atoms": [5, 4, 3, 2]})
    ('dihedral', (2, 3, 4, 5), ())
    >>> _descriptor_key({"kind": "coordination", "groups": [[9, 8], [1]], "r0": 0.45})
    ('coordination', ((1,), (8, 9)), (('r0', 0.45),))
    """
    if "atoms" in d:
        atoms = tuple(int(a) for a in d["atoms"])
        atoms = min(atoms, atoms[::-1])
        masses = None
    else:
        given = d.get("masses") or [[None] * len(g) for g in d["groups"]]
        groups = sorted(tuple(sorted(zip((int(a) for a in g), m)))
                        for g, m in zip(d["groups"], given))
        atoms = tuple(tuple(a for a, _ in g) for g in groups)
        masses = tuple(tuple(m for _, m in g) for g in groups) if d.get("masses") else None
    params = tuple(sorted((k, v) for k, v in d.items() if k not in _NAMING_KEYS))
    if masses is not None:
        params += (("masses", masses),)
    return d["kind"], atoms, params


def _term_keys(spec):
    """{(descriptor key, transform): (label, raw coefficient weight / scale, scale)}."""
    descriptors = {d["id"]: d for d in spec.descriptors}
    out = {}
    for t in spec.terms:
        d = descriptors[t["descriptor"]]
        key = (_descriptor_key(d), t["transform"])
        label = f"{t['transform']}({d.get('label', d['id'])})"
        prev = out.get(key)
        coef = float(t["weight"]) / float(t["scale"])
        out[key] = (label, coef + (prev[1] if prev else 0.0), float(t["scale"]))
    return out


@dataclass(frozen=True)
class SpecComparison:
    """How CV 2 differs from CV 1 in its terms.

    Attributes
    ----------
    added : tuple of str
        Terms of CV 2 that CV 1 lacks (``transform(descriptor label)``).
    removed : tuple of str
        Terms of CV 1 that CV 2 lacks.
    kept : tuple of str
        Terms in both.
    cosine : float or None
        ``|cos|`` of the angle between the two weight vectors over the union
        of terms, each term standardized by one common scale (CV 2's, or CV
        1's for a term only CV 1 has): 1 for the same direction, 0 for no term
        in common. The absolute value, as a CV's sign is arbitrary. None when
        a spec has no weight.
    """

    added: tuple
    removed: tuple
    kept: tuple
    cosine: float | None

    def summary(self):
        """A few lines for a person."""
        def names(items):
            return ", ".join(items) if items else "none"
        cos = "n/a" if self.cosine is None else f"{self.cosine:.3f}"
        return (f"terms kept: {names(self.kept)}\nterms added: {names(self.added)}\n"
                f"terms removed: {names(self.removed)}\n"
                f"|cosine| of the standardized weight vectors: {cos}")


def compare_specs(first, second):
    """Terms added, removed and kept from CV 1 to CV 2, and the cosine of their weights.

    Terms are matched by descriptor kind, atoms and transform (not by id,
    which may differ between two runs of ``suggest``). The same torsion as an
    identity term in one CV and as cos/sin terms in the other counts as
    different terms.

    Parameters
    ----------
    first, second : cvdesign.Spec or dict
        CV 1 and CV 2, for the same topology: specs (``load_spec``) or spec
        documents (entries of ``suggest(...).specs``, validated through
        ``Spec.from_dict``).

    Returns
    -------
    SpecComparison

    Raises
    ------
    cvdesign.errors.InputError
        Naming the argument, for a dict that is not a valid spec, a path or
        text (read it with ``load_spec``), or anything else that is not a
        spec.

    Examples
    --------
    >>> from types import SimpleNamespace
    >>> def spec(terms):
    ...     return SimpleNamespace(
    ...         descriptors=[{"id": i, "kind": "distance", "atoms": a} for i, a, _ in terms],
    ...         terms=[{"descriptor": i, "transform": "identity", "scale": 1.0, "weight": w}
    ...                for i, _, w in terms])
    >>> c = compare_specs(spec([("d1", [0, 5], 1.0)]),
    ...                   spec([("x", [0, 5], 1.0), ("y", [1, 4], 1.0)]))
    >>> c.added, c.removed, round(c.cosine, 4)  # cos 45 degrees
    (('identity(y)',), (), 0.7071)
    """
    a = _term_keys(_as_spec(first, "first", ("descriptors", "terms")))
    b = _term_keys(_as_spec(second, "second", ("descriptors", "terms")))
    keys = list(dict.fromkeys([*b, *a]))
    u = np.array([a[k][1] * (b[k] if k in b else a[k])[2] if k in a else 0.0 for k in keys])
    v = np.array([b[k][1] * b[k][2] if k in b else 0.0 for k in keys])
    norm = float(np.linalg.norm(u) * np.linalg.norm(v))
    cosine = None if norm == 0 else abs(float(u @ v)) / norm
    return SpecComparison(added=tuple(b[k][0] for k in b if k not in a),
                          removed=tuple(a[k][0] for k in a if k not in b),
                          kept=tuple(b[k][0] for k in b if k in a), cosine=cosine)
