"""The report's figures: matplotlib, drawn off-screen, returned as deterministic SVG text.

Every function takes plain data, as the files of an output directory hold it (the
ranking, the score card, the specs, ``report-data.json``), and returns a
:class:`Figure`: the SVG text, a caption, an alt text, and the numbers it drew
(``data``), so that what a picture shows can be checked against the tables.

Conventions, the same in every figure:

- state ``i`` of the input order has colour ``i`` of the Okabe-Ito palette
  (:data:`PALETTE`; Okabe and Ito 2008, "Color Universal Design", safe for the common
  forms of colour blindness), cycled beyond eight states;
- every numeric axis is labelled with its unit (nm, ps, kJ/mol, CV units, or
  "dimensionless");
- figures are drawn on a :class:`matplotlib.figure.Figure` with matplotlib's default
  style (whatever the user's ``matplotlibrc``), no display and no pyplot state; the SVG has
  its text as text (small, searchable; drawn in the viewer's sans-serif font), a fixed
  ``svg.hashsalt`` and no date, so the same inputs give the same bytes.
"""

import contextlib
import io
import math
from dataclasses import dataclass, field

import numpy as np

from .._version import __version__
from ..bias.funnel import draw_funnel, funnel_radius
from ..bias.hints import FOLD_SPREADS
from ..constants import BOLTZMANN_KJ_MOL_K

__all__ = ["PALETTE", "Figure", "state_colors", "cv_distributions", "cv_traces",
           "term_weights", "pool_scores", "redundancy_groups", "implied_timescales",
           "tica_resolved", "tica_states", "funnel_positions"]

#: The Okabe-Ito palette (Okabe and Ito 2008): orange, sky blue, bluish green, yellow, blue,
#: vermillion, reddish purple, black. State ``i`` (input order) gets colour ``i``.
PALETTE = ("#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7",
           "#000000")

#: How many panels of traces (input files) a figure shows at most.
MAX_TRACE_PANELS = 12
#: How many score-card rows the pool figure shows.
POOL_ROWS = 30
#: How many ranked CVs the implied-timescale figure shows.
TIMESCALE_CVS = 5

_RC = {
    "svg.hashsalt": "cvdesign-report",  # fixed ids: the same inputs give the same bytes
    "svg.fonttype": "none",             # text as text: small files, readable by screen readers
    "font.family": "sans-serif",
    "font.size": 8.0,
    "axes.titlesize": 8.0,
    "axes.labelsize": 8.0,
    "legend.fontsize": 7.0,
    "xtick.labelsize": 7.0,
    "ytick.labelsize": 7.0,
    "savefig.dpi": 100,
    "figure.dpi": 100,
}

_METADATA = {"Date": None, "Creator": f"cvdesign {__version__} report"}

#: Lines of the ranked CVs in the timescale figure: black and greys with their own dashes
#: and markers, so that no CV is mistaken for a state.
_CV_STYLES = (("#000000", "-", "o"), ("#555555", "--", "s"), ("#777777", "-.", "^"),
              ("#333333", ":", "v"), ("#999999", (0, (5, 1, 1, 1)), "D"))


@dataclass(frozen=True)
class Figure:
    """One figure of the report.

    Attributes
    ----------
    name : str
        A short identifier, unique within a report (e.g. ``"cv-01-distributions"``).
    caption : str
        What the figure shows, for the page.
    alt : str
        The alternative text of the image: what it shows, in words and numbers.
    svg : str
        The SVG document.
    data : dict
        The numbers drawn (units in the key names or as for the figure's axes).
    axes : tuple of dict
        Per drawn axis: ``{"x": label, "y": label, "x_ticks": kind, "y_ticks": kind}``,
        kind ``'numeric'``, ``'text'`` (categories, no unit) or ``'none'`` (no tick
        labels shown, e.g. the inner side of panels sharing an axis).
    text_outside : tuple of str
        The texts (titles, labels, legends, ticks) that reach beyond the figure's edges
        after its layout, as matplotlib measures them (its own font): cut off in the
        picture. Empty when every text fits.
    """

    name: str
    caption: str
    alt: str
    svg: str
    data: dict = field(default_factory=dict)
    axes: tuple = ()
    text_outside: tuple = ()


def state_colors(states):
    """The colour of each state: Okabe-Ito colour ``i`` for state ``i`` (input order).

    Parameters
    ----------
    states : sequence of str
        State names in input order.

    Returns
    -------
    dict
        ``{state: "#RRGGBB"}``, cycling through :data:`PALETTE` beyond eight states.

    Examples
    --------
    >>> state_colors(["closed", "open"])
    {'closed': '#E69F00', 'open': '#56B4E9'}
    """
    return {s: PALETTE[i % len(PALETTE)] for i, s in enumerate(states)}


# ------------------------------------------------------------------------------ drawing
@contextlib.contextmanager
def _style():
    """matplotlib's default style plus the report's settings, whatever the user's rc."""
    import matplotlib
    import matplotlib.style

    with matplotlib.style.context("default"), matplotlib.rc_context(_RC):
        yield


def _new(width, height, nrows=1, ncols=1, **kwargs):
    from matplotlib.figure import Figure as _MplFigure

    fig = _MplFigure(figsize=(width, height), layout="constrained")
    axes = fig.subplots(nrows, ncols, squeeze=False, **kwargs)
    return fig, axes


def _ticks(axis):
    """'numeric', 'text' (categories) or 'none' (no visible tick label), after drawing."""
    texts = [t.get_text() for t in axis.get_ticklabels() if t.get_visible() and t.get_text()]
    if not texts:
        return "none"
    for t in texts:
        if "mathdefault" in t:  # log-scale labels such as 10^2
            continue
        try:
            float(t.replace("\u2212", "-"))
        except ValueError:
            return "text"
    return "numeric"


def _axes_record(fig):
    return tuple({"x": ax.get_xlabel(), "y": ax.get_ylabel(), "x_ticks": _ticks(ax.xaxis),
                  "y_ticks": _ticks(ax.yaxis)} for ax in fig.axes if ax.axison)


def _text_outside(fig, renderer, tolerance_px=1.0):
    """The visible texts of a drawn figure whose extent, as `renderer` (the one that drew it)
    measures it, reaches beyond the figure's edges."""
    from matplotlib.text import Text

    box = fig.bbox
    hidden = set()  # tick labels of ticks beyond the view limits are not drawn
    for ax in fig.axes:
        for axis in (ax.xaxis, ax.yaxis):
            lo, hi = sorted(axis.get_view_interval())
            for tick in axis.get_major_ticks() + axis.get_minor_ticks():
                loc = tick.get_loc()
                if loc is None or not lo - 1e-9 * (hi - lo) <= loc <= hi + 1e-9 * (hi - lo):
                    hidden.update(id(t) for t in (tick.label1, tick.label2))
    out = []
    for t in fig.findobj(Text):
        if (id(t) in hidden or not t.get_visible() or not t.get_text()
                or t.get_figure() is None):
            continue
        ext = t.get_window_extent(renderer)
        if (ext.x0 < box.x0 - tolerance_px or ext.y0 < box.y0 - tolerance_px
                or ext.x1 > box.x1 + tolerance_px or ext.y1 > box.y1 + tolerance_px):
            out.append(t.get_text())
    return tuple(out)


def _finish(fig, name, caption, alt, data):
    buf = io.StringIO()
    outside = []  # measured when the SVG is drawn, after its layout: no second drawing
    cid = fig.canvas.mpl_connect(
        "draw_event", lambda event: outside.append(_text_outside(fig, event.renderer)))
    fig.savefig(buf, format="svg", metadata=_METADATA)
    fig.canvas.mpl_disconnect(cid)
    return Figure(name=name, caption=caption, alt=alt, svg=buf.getvalue(), data=data,
                  axes=_axes_record(fig), text_outside=outside[-1] if outside else ())


def _per(units):
    """'1/nm' for 'nm', '1/(CV units)' for 'CV units'."""
    return f"1/{units}" if " " not in units else f"1/({units})"


def _interval(ax, y, ci, *, horizontal=True):
    """A 95 % interval as a thin black line (no error-bar sign conventions: the interval
    need not contain the estimate)."""
    if ci is None or ci[0] is None or ci[1] is None:
        return
    if horizontal:
        ax.plot([ci[0], ci[1]], [y, y], color="black", lw=1.0, solid_capstyle="butt")
        ax.plot([ci[0], ci[1]], [y, y], linestyle="none", marker="|", color="black", ms=4)
    else:
        ax.plot([y, y], [ci[0], ci[1]], color="black", lw=1.0)


def _shorten(text, limit=48):
    return text if len(text) <= limit else text[:limit - 1] + "\u2026"


def _fmt(x, spec=".3g"):
    return "n/a" if x is None else format(x, spec)


def _no_data(ax, text):
    ax.text(0.5, 0.5, text, ha="center", va="center", transform=ax.transAxes, fontsize=8,
            color="#555555", wrap=True)


#: A reachable bound is drawn when it lies within the span of the drawn data widened by this
#: fraction of that span on each side (farther away it would squeeze the data; the caption
#: then gives it instead).
BOUND_VIEW = 0.25


def _check_reachable(reachable):
    """``(lower, upper)`` (None where unbounded), or None when not known."""
    if reachable is None:
        return None
    lower, upper = reachable
    for x in (lower, upper):
        if x is not None and not math.isfinite(float(x)):
            raise ValueError(f"reachable range bounds must be finite numbers or None; got "
                             f"{reachable!r}")
    return (None if lower is None else float(lower), None if upper is None else float(upper))


def _bounds_in_view(reachable, low, high):
    """``{"lower": x, "upper": x}`` of the reachable bounds to draw for data in [low, high]."""
    if reachable is None:
        return {}
    margin = BOUND_VIEW * max(high - low, abs(high) * 1e-9, 1e-300)
    return {side: x for side, x in zip(("lower", "upper"), reachable)
            if x is not None and low - margin <= x <= high + margin}


def _draw_bounds(ax, drawn, reachable, *, vertical):
    """The reachable bounds as black dash-dot lines, the side beyond them hatched grey (values
    no structure gives). Axis limits are kept as the data set them (widened to the bound)."""
    for k, (side, x) in enumerate(drawn.items()):
        line, span = (ax.axvline, ax.axvspan) if vertical else (ax.axhline, ax.axhspan)
        lo, hi = ax.get_xlim() if vertical else ax.get_ylim()
        pad = 0.03 * (max(hi, x) - min(lo, x))  # the line off the spine, the hatch seen
        lo, hi = min(lo, x - pad), max(hi, x + pad)
        line(x, color="black", ls="-.", lw=1.0, zorder=3,
             label="reachable bound" if k == 0 else None)
        beyond = (lo, x) if side == "lower" else (x, hi)
        if beyond[1] > beyond[0]:
            span(*beyond, facecolor="none", edgecolor="#999999", hatch="///", lw=0, zorder=0)
        (ax.set_xlim if vertical else ax.set_ylim)(lo, hi)


def _range_words(reachable, drawn, at_bound):
    """Caption text: the reachable range, which bounds are drawn, the states at a bound."""
    if reachable is None:
        return ""
    lower, upper = ("unbounded" if x is None else f"{x:.4g}" for x in reachable)
    text = f" Reachable range of the CV (from its terms): [{lower}, {upper}]"
    far = [f"{side} {x:.4g}" for side, x in zip(("lower", "upper"), reachable)
           if x is not None and side not in drawn]
    text += ("; its bounds are the dash-dot lines, values beyond them (hatched) no structure "
             "gives" if drawn else "") + (
        f"; {' and '.join(far)} lie{'s' if len(far) == 1 else ''} beyond the drawn range"
        if far else "") + "."
    if at_bound:
        text += (" Folded: " + ", ".join(f"{s} sits at the {side} bound" for s, side in
                                         at_bound.items())
                 + f" (its mean within {FOLD_SPREADS:g} spreads of it): there the CV changes only to second "
                 "order with its descriptors, structures on either side of the fold give the "
                 "same value and the bias force along the CV fades.")
    return text


def _check_at_bound(at_bound, states):
    at_bound = dict(at_bound or {})
    for s, side in at_bound.items():
        if s not in states or side not in ("lower", "upper"):
            raise ValueError(f"at_bound: {s!r}: {side!r} must name a state and 'lower' or "
                             "'upper'")
    return {s: at_bound[s] for s in states if s in at_bound}


# ------------------------------------------------------------------------ ranked CVs
def _frames(total):
    """A count of frames as an int; a sum of weights (biased runs) that is not whole as a
    float with 3 significant digits, so that a fraction of a frame is not rounded away."""
    whole = round(float(total))
    return int(whole) if abs(total - whole) < 1e-9 else float(f"{total:.3g}")


def cv_distributions(name, label, heldout, states_stats, *, states, temperature_k,
                     units="CV units", reachable=None, at_bound=None):
    """Per-state histograms of a CV on held-out frames, and -kT ln p per state.

    Left: each state's held-out histogram as a probability density (1/CV units), with
    the state's mean (dashed line) and mean +- one standard deviation (band) from the
    spec. Right: ``-kT ln p`` of each state's own histogram, shifted to 0 at its
    minimum, in kJ/mol at `temperature_k`: an estimate from unbiased sampling within
    each state, not a free energy of the transition between them (the region between
    the states is not sampled).

    Parameters
    ----------
    name : str
        Figure name, e.g. ``"cv-01-distributions"``.
    label : str
        The CV, for titles (e.g. ``"rank 1 (cv-01.json)"``).
    heldout : dict
        ``{"edges": [n_bins + 1 increasing floats, CV units],
        "counts": {state: [n_bins counts]}}``, optionally ``"outside": {state:
        [frames below the first edge, frames above the last]}``: those count in
        each state's total (the density is per frame of the state) but are not
        drawn, and the caption says how many there are; optionally ``"weighted":
        [states]``, the states whose counts are sums of frame weights (biased
        runs; without the key, a state whose outside count is not whole): the
        caption gives their outside part as a weight, not as frames.
    states_stats : dict
        ``{state: {"mean": float, "std": float}}`` in CV units (the spec's ``states``).
    states : sequence of str
        All states in input order (for the colours).
    temperature_k : float
        K, for kT.
    units : str, default="CV units"
        The CV's units.
    reachable : (float or None, float or None), optional
        The CV's reachable range (the spec's ``reachable_range``; None on a side
        where it is unbounded). A bound near the drawn data (within
        :data:`BOUND_VIEW` of its span) is drawn as a dash-dot line with the
        side beyond it hatched; the caption gives the range in any case.
    at_bound : dict, optional
        ``{state: "lower" | "upper"}``: the states at a bound (the spec's
        ``at_bound``), a folded coordinate; named in the legend and caption.

    Returns
    -------
    Figure
        ``data``: ``edges``, per state ``density`` (1/CV units), ``profile_kj_mol``
        (None where a bin is empty), ``means``, ``stds``, ``counts`` (frames in the
        bins), ``outside`` (frames beyond them), ``colors``; ``kT_kj_mol``;
        ``reachable`` (``[lower, upper]`` or None), ``bounds_drawn`` (``{side: value}``)
        and ``at_bound``.

    Examples
    --------
    >>> fig = cv_distributions("cv-01", "rank 1", {"edges": [0.0, 1.0, 2.0, 3.0],
    ...     "counts": {"A": [3, 1, 0], "B": [0, 1, 3]}},
    ...     {"A": {"mean": 0.9, "std": 0.5}, "B": {"mean": 2.1, "std": 0.5}},
    ...     states=["A", "B"], temperature_k=300.0)
    >>> fig.data["density"]["A"], fig.data["means"]["B"]
    ([0.75, 0.25, 0.0], 2.1)
    >>> fig.data["profile_kj_mol"]["A"][2] is None
    True

    A bounded CV whose state A sits at its lower bound:

    >>> fig = cv_distributions("cv-01", "rank 1", {"edges": [0.0, 1.0, 2.0, 3.0],
    ...     "counts": {"A": [3, 1, 0], "B": [0, 1, 3]}},
    ...     {"A": {"mean": 0.9, "std": 0.5}, "B": {"mean": 2.1, "std": 0.5}},
    ...     states=["A", "B"], temperature_k=300.0, reachable=(0.0, None),
    ...     at_bound={"A": "lower"})
    >>> fig.data["bounds_drawn"], fig.data["at_bound"]
    ({'lower': 0.0}, {'A': 'lower'})
    """
    reachable = _check_reachable(reachable)
    at_bound = _check_at_bound(at_bound, states)
    edges = np.asarray(heldout["edges"], dtype=np.float64)
    if edges.ndim != 1 or edges.size < 2 or not np.all(np.isfinite(edges)) \
            or not np.all(np.diff(edges) > 0):
        raise ValueError("held-out histogram edges must be at least two increasing finite "
                         "numbers")
    widths = np.diff(edges)
    centres = 0.5 * (edges[:-1] + edges[1:])
    kt = BOLTZMANN_KJ_MOL_K * float(temperature_k)
    colors = state_colors(states)
    unknown = sorted(set(heldout["counts"]) - set(states))
    if unknown:
        raise ValueError(f"held-out counts for unknown state {unknown[0]!r}")
    density, profile, counts, outside = {}, {}, {}, {}
    beyond = heldout.get("outside") or {}
    for s in states:
        if s not in heldout["counts"]:
            continue
        c = np.asarray(heldout["counts"][s], dtype=np.float64)
        if c.shape != widths.shape or np.any(c < 0) or not np.all(np.isfinite(c)):
            raise ValueError(f"held-out counts of state {s!r} must be {widths.size} "
                             "non-negative numbers, one per bin")
        out = np.asarray(beyond.get(s, [0, 0]), dtype=np.float64)
        if out.shape != (2,) or np.any(out < 0) or not np.all(np.isfinite(out)):
            raise ValueError(f"held-out frames outside the bins of state {s!r} must be two "
                             "non-negative numbers (below, above)")
        counts[s] = _frames(c.sum())  # frames (biased runs: sums of weights)
        outside[s] = _frames(out.sum())
        if c.sum() == 0:
            continue
        d = c / ((c.sum() + out.sum()) * widths)
        f = np.full_like(d, np.nan)
        f[c > 0] = -kt * np.log(d[c > 0])
        f -= np.nanmin(f)
        density[s] = d.tolist()
        profile[s] = [None if math.isnan(v) else float(v) for v in f]
    means = {s: float(states_stats[s]["mean"]) for s in states if s in states_stats}
    stds = {s: float(states_stats[s]["std"]) for s in states if s in states_stats}
    with _style():
        fig, ((left, right),) = _new(7.2, 2.8, 1, 2)
        for s in states:
            col = colors[s]
            if s in density:
                fold = f"; at the {at_bound[s]} bound" if s in at_bound else ""
                left.stairs(density[s], edges, color=col, lw=1.4,
                            label=f"{s} (held-out{fold})")
                f = np.array([np.nan if v is None else v for v in profile[s]])
                right.plot(centres, f, color=col, lw=1.4, marker=".", ms=3, label=s)
            if s in means:
                left.axvline(means[s], color=col, ls="--", lw=1.0)
                left.axvspan(means[s] - stds[s], means[s] + stds[s], color=col, alpha=0.15,
                             lw=0)
        drawn = _bounds_in_view(reachable, float(edges[0]), float(edges[-1]))
        for ax in (left, right):
            _draw_bounds(ax, drawn, reachable, vertical=True)
        left.set_xlabel(f"CV ({units})")
        left.set_ylabel(f"probability density ({_per(units)})")
        left.set_title(f"{label}: held-out frames per state\n"
                       "(dashed: mean, band: \u00b1 std, from the spec)")
        if density:
            left.legend(loc="best")
        else:
            _no_data(left, "no held-out frames")
        right.set_xlabel(f"CV ({units})")
        right.set_ylabel("\u2212kT ln p (kJ/mol)")
        weighted = _weighted_states(heldout, outside, states)
        kind = ("unbiased-sampling" if not set(weighted) & set(density) else "reweighted"
                if set(weighted) >= set(density) else "unbiased-sampling or reweighted")
        right.set_title(f"\u2212kT ln p per state at {temperature_k:g} K: {kind}\n"
                        "estimate, not the free energy of the transition")
        data = {"edges": edges.tolist(), "density": density, "profile_kj_mol": profile,
                "means": means, "stds": stds, "counts": counts, "outside": outside,
                "colors": {s: colors[s] for s in states}, "kT_kj_mol": kt,
                "temperature_k": float(temperature_k),
                "reachable": None if reachable is None else list(reachable),
                "bounds_drawn": drawn, "at_bound": at_bound}
        alt = (f"{label}: histograms of the CV ({units}) on held-out frames, one per state, "
               "with each state's mean and spread from the spec ("
               + "; ".join(f"{s}: {means[s]:.4g} \u00b1 {stds[s]:.3g}" for s in means)
               + f"), and -kT ln p of each state's histogram in kJ/mol at "
               f"{temperature_k:g} K." + _range_words(reachable, drawn, at_bound))
        caption = (f"{label}: does the CV split the states on frames the fit never saw? "
                   "Left, each state's held-out histogram with its mean and spread from the "
                   f"spec; right, \u2212kT ln p per state (kJ/mol, {temperature_k:g} K), an "
                   + _sampling_words(weighted, density)
                   + ", not the free energy of the transition."
                   + _outside_words(outside, heldout.get("weighted"))
                   + _range_words(reachable, drawn, at_bound))
        return _finish(fig, name, caption, alt, data)


def _weighted_states(heldout, outside, states):
    """The states whose held-out counts are sums of frame weights (biased runs): the
    document's ``weighted``, else those whose count beyond the bins is not whole."""
    weighted = heldout.get("weighted")
    if weighted is None:
        weighted = [s for s, v in outside.items() if isinstance(v, float)]
    return [s for s in states if s in weighted]


def _sampling_words(weighted, drawn):
    """Where the histograms come from: unbiased sampling within each state, or, for the
    states with biased runs, their frames reweighted by exp(V/kT)."""
    unbiased = "estimate from unbiased sampling within each state"
    weighted = [s for s in weighted if s in drawn]
    if not weighted:
        return unbiased
    words = ("estimate from the frames of biased runs reweighted by exp(V/kT) (an unbiased "
             "estimate only as far as the reweighting holds; effective sample sizes in the "
             "summary)")
    if set(weighted) >= set(drawn):
        return words + " within each state"
    return (unbiased + "; for " + ", ".join(weighted) + ", which hold biased runs, an "
            + words)


def _outside_words(outside, weighted):
    """The caption's sentences on what lies beyond the drawn range: frames of the unweighted
    states, the weight of the weighted ones (biased runs: sums of frame weights)."""
    if weighted is None:  # (a document without the key: a count that is not whole)
        weighted = [s for s, v in outside.items() if isinstance(v, float)]
    frames = {s: v for s, v in outside.items() if v and s not in weighted}
    weights = {s: v for s, v in outside.items() if v and s in weighted}
    text = ""
    if frames:
        text += (f" {sum(frames.values()):g} held-out frame(s) beyond the drawn range are not "
                 "shown (" + ", ".join(f"{s}: {v:g}" for s, v in frames.items()) + ").")
    if weights:
        text += (f" Held-out weight {sum(weights.values()):.3g} beyond the drawn range is not "
                 "shown (" + ", ".join(f"{s}: {v:g}" for s, v in weights.items())
                 + "; frames of biased runs count with their reweighting factors, which "
                 "average 1 per frame of the state, so this is a weight, not a frame count).")
    return text


def cv_traces(name, label, traces, *, states, units="CV units", reachable=None,
              at_bound=None):
    """The CV along time in each input file, coloured by state.

    One panel per file (at most :data:`MAX_TRACE_PANELS`, the first ones; ``data`` says
    how many were left out): a thin grey line through the subsampled frames and a dot
    per frame in the colour of its state (for unlabelled runs, the proposed state).

    Parameters
    ----------
    name, label : str
        Figure name and the CV, for titles.
    traces : list of dict
        ``{"file", "frame": [int], "time_ps": [float] or None, "value": [float, CV
        units], "state": [str]}``; the x axis is the time in ps, or the frame number
        when the file stores no times.
    states : sequence of str
        All states in input order (for the colours).
    units : str, default="CV units"
    reachable : (float or None, float or None), optional
        The CV's reachable range; a bound near the drawn values (within
        :data:`BOUND_VIEW` of their span, over all panels) is drawn in every
        panel as a dash-dot line, the side beyond it hatched.
    at_bound : dict, optional
        ``{state: "lower" | "upper"}``: states at a bound (folded), named in the
        legend and caption.

    Returns
    -------
    Figure
        ``data``: ``panels`` (per file: ``file``, ``x`` ("time_ps" or "frame"),
        ``points``, ``per_state`` counts, ``value_min``, ``value_max``), ``n_files``,
        ``shown``, ``reachable``, ``bounds_drawn``, ``at_bound``, ``gaps`` (whether
        some run drawn leaves out frames, those in no state; the caption says so).

    Examples
    --------
    >>> fig = cv_traces("t", "rank 1", [{"file": "a.xtc", "frame": [0, 5, 10],
    ...     "time_ps": None, "value": [0.1, 0.2, 0.9], "state": ["A", "A", "B"]}],
    ...     states=["A", "B"])
    >>> fig.data["panels"][0]["per_state"], fig.data["panels"][0]["x"]
    ({'A': 2, 'B': 1}, 'frame')
    """
    reachable = _check_reachable(reachable)
    at_bound = _check_at_bound(at_bound, states)
    colors = state_colors(states)
    shown = traces[:MAX_TRACE_PANELS]
    ncols = 1 if len(shown) <= 3 else 2
    nrows = max(1, math.ceil(len(shown) / ncols))
    panels = []
    with _style():
        fig, axes = _new(7.2, 0.4 + 1.6 * nrows, nrows, ncols, sharey=True)
        flat = axes.ravel()
        for ax, tr in zip(flat, shown):
            value = np.asarray(tr["value"], dtype=np.float64)
            frame = np.asarray(tr["frame"])
            st = list(tr["state"])
            if not (value.shape == frame.shape == (len(st),)):
                raise ValueError(f"trace of {tr['file']!r}: frame, value and state must have "
                                 "the same length")
            if tr.get("time_ps") is not None:
                x = np.asarray(tr["time_ps"], dtype=np.float64)
                if x.shape != value.shape:
                    raise ValueError(f"trace of {tr['file']!r}: time_ps must have one entry "
                                     "per point")
                xname, xlabel = "time_ps", "time (ps)"
            else:
                x, xname, xlabel = frame.astype(np.float64), "frame", "frame (index in the file)"
            ax.plot(x, value, color="#BBBBBB", lw=0.5, zorder=1, rasterized=True)
            per_state = {}
            st_arr = np.asarray(st, dtype=object)
            for s in states:
                sel = st_arr == s
                if sel.any():
                    per_state[s] = int(sel.sum())
                    ax.scatter(x[sel], value[sel], s=2.5, color=colors[s], lw=0, zorder=2,
                               label=s, rasterized=True)
            unknown = sorted(set(st) - set(states))
            if unknown:
                raise ValueError(f"trace of {tr['file']!r}: unknown state {unknown[0]!r}")
            ax.set_title(_shorten(str(tr["file"]), 60), loc="left")
            ax.set_xlabel(xlabel)
            ax.set_ylabel(f"CV ({units})")
            panels.append({"file": tr["file"], "x": xname, "points": int(value.size),
                           "per_state": per_state,
                           "value_min": float(value.min()) if value.size else None,
                           "value_max": float(value.max()) if value.size else None})
        for ax in flat[len(shown):]:
            ax.set_axis_off()
        if not shown:
            flat[0].set_axis_off()
            _no_data(flat[0], "no traces")
        seen = [v for p in panels for v in (p["value_min"], p["value_max"]) if v is not None]
        drawn = _bounds_in_view(reachable, min(seen), max(seen)) if seen else {}
        for ax in flat[:len(shown)]:
            _draw_bounds(ax, drawn, reachable, vertical=False)
        handles = [_legend_dot(colors[s]) for s in states]
        names = [s + (f" (at the {at_bound[s]} bound)" if s in at_bound else "") for s in states]
        if drawn:
            from matplotlib.lines import Line2D

            handles.append(Line2D([], [], color="black", ls="-.", lw=1.0))
            names.append("reachable bound")
        # long names (a state at a bound) in fewer columns, so that the legend fits
        fig.legend(handles, names, loc="outside upper right",
                   ncols=min(len(names), 6 if sum(map(len, names)) <= 60 else 2),
                   title=f"{label}: state", frameon=False)
        data = {"panels": panels, "n_files": len(traces), "shown": len(shown),
                "colors": {s: colors[s] for s in states},
                "reachable": None if reachable is None else list(reachable),
                "bounds_drawn": drawn, "at_bound": at_bound}
        more = (f" (the first {len(shown)} of {len(traces)} files)"
                if len(shown) < len(traces) else "")
        gaps = any(np.any(np.diff(np.asarray(tr["frame"])) > np.min(np.diff(
            np.asarray(tr["frame"])))) for tr in shown if len(tr["frame"]) > 2)
        data["gaps"] = bool(gaps)
        alt = (f"{label}: the CV ({units}) along time in {len(shown)} input file(s){more}, "
               "each frame coloured by its state (" + ", ".join(
                   f"{s}: {sum(p['per_state'].get(s, 0) for p in panels)} points"
                   for s in states) + ")." + _range_words(reachable, drawn, at_bound))
        caption = (f"{label} along time in each input file{more}, coloured by state: a good "
                   "CV stays in its state's range within a run and jumps only at a change of "
                   "state. Frames are subsampled evenly (by frame number)."
                   + (" Frames in no state (between the states, as the labels have it) are "
                      "left out: the gaps along a run." if gaps else "")
                   + _range_words(reachable, drawn, at_bound))
        return _finish(fig, name, caption, alt, data)


def _legend_dot(color):
    from matplotlib.lines import Line2D

    return Line2D([], [], color=color, marker="o", linestyle="none", ms=5)


def term_weights(name, label, terms):
    """The terms of a CV: weights with 95 % intervals (when known), and selection
    frequencies.

    Parameters
    ----------
    name, label : str
        Figure name and the CV, for titles.
    terms : list of dict
        The ranking's terms: ``label``, ``transform``, ``weight``, optional
        ``weight_ci`` ([low, high]) and ``selection_frequency`` (0-1 or None).

    Returns
    -------
    Figure
        ``data``: ``labels``, ``weights``, ``weight_ci``, ``selection_frequency``.

    Examples
    --------
    >>> fig = term_weights("w", "rank 1", [{"label": "dist C1-C8", "transform": "identity",
    ...     "weight": 0.8, "weight_ci": [0.7, 0.9], "selection_frequency": 0.95}])
    >>> fig.data["weights"], fig.data["selection_frequency"]
    ([0.8], [0.95])
    """
    labels = [t["label"] if t["transform"] == "identity" else f"{t['transform']}({t['label']})"
              for t in terms]
    weights = [float(t["weight"]) for t in terms]
    cis = [t.get("weight_ci") for t in terms]
    freq = [t.get("selection_frequency") for t in terms]
    y = np.arange(len(terms))[::-1]
    with _style():
        fig, ((left, right),) = _new(7.2, 1.0 + 0.3 * len(terms), 1, 2, sharey=True)
        left.barh(y, weights, color="#999999", height=0.6)
        for yi, ci in zip(y, cis):
            _interval(left, yi, ci)
        left.axvline(0.0, color="black", lw=0.6)
        left.set_yticks(y, [_shorten(v) for v in labels])
        left.set_xlabel("weight on the standardized term\n(CV units per term std)")
        known = [ci for ci in cis if ci and None not in ci]
        left.set_title("weights (black: nominal 95 % bootstrap interval)" if known else
                       "weights (no intervals: no bootstrap)")
        if all(f is None for f in freq):
            _no_data(right, "selection frequency not measured\n(no bootstrap refits)")
        else:
            right.barh(y, [0.0 if f is None else f for f in freq], color="#999999", height=0.6)
        right.set_xlim(0.0, 1.0)
        right.set_xlabel("selection frequency\n(fraction of bootstrap refits)")
        right.set_title("how often refits keep the term")
        data = {"labels": labels, "weights": weights, "weight_ci": cis,
                "selection_frequency": freq}
        alt = (f"{label}: weight of each term"
               + (" with its nominal 95 % interval" if known else "")
               + (", and how often bootstrap refits keep it: " if any(
                   f is not None for f in freq) else ": ") + "; ".join(
                   f"{lab} {w:+.3g}" + (f" [{ci[0]:+.3g}, {ci[1]:+.3g}]"
                                        if ci and None not in ci else "")
                   + ("" if f is None else f", selected in {f:.0%}")
                   for lab, w, ci, f in zip(labels, weights, cis, freq)) + ".")
        caption = (f"{label}: which descriptors carry the CV. A weight whose interval crosses "
                   "zero, or a term that refits seldom keep, is not well determined by the "
                   "data.")
        return _finish(fig, name, caption, alt, data)


# ------------------------------------------------------------------------------- pool
def pool_scores(rows, *, lag_ps=None, n=POOL_ROWS):
    """The best descriptors of the score card: separation and slowness, with intervals.

    Parameters
    ----------
    rows : list of dict
        Score-card rows in card order (best separating first): ``id``, ``label``,
        ``fisher_ratio``, ``fisher_ratio_ci`` ([low, high] or None), ``autocorrelation``
        (None when not measured), ``autocorrelation_ci``.
    lag_ps : float or None
        The lag of the autocorrelation, ps (for the label).
    n : int, default=30
        Rows shown.

    Returns
    -------
    Figure
        ``data``: ``ids``, ``labels``, ``fisher_ratio``, ``fisher_ratio_ci``,
        ``autocorrelation``, ``autocorrelation_ci``, ``log_fisher`` (bool).

    Examples
    --------
    >>> fig = pool_scores([{"id": "d:0-1", "label": "dist A-B", "fisher_ratio": 4.0,
    ...     "fisher_ratio_ci": [3.5, 4.4], "autocorrelation": 0.9,
    ...     "autocorrelation_ci": [0.88, 0.92]}], lag_ps=2.0)
    >>> fig.data["ids"], fig.data["fisher_ratio"]
    (['d:0-1'], [4.0])
    """
    top = list(rows[:n])
    y = np.arange(len(top))[::-1]
    labels = [r["label"] for r in top]
    fisher = [r.get("fisher_ratio") for r in top]
    rho = [r.get("autocorrelation") for r in top]
    known = [f for f in fisher if f is not None]
    log_fisher = bool(known) and min(known) > 0 and max(known) / min(known) > 30
    with _style():
        fig, ((left, right),) = _new(7.2, 1.2 + 0.17 * max(len(top), 3), 1, 2, sharey=True)
        left.barh(y, [0.0 if f is None else f for f in fisher], color="#999999", height=0.6)
        for yi, r in zip(y, top):
            _interval(left, yi, r.get("fisher_ratio_ci"))
        if log_fisher:
            left.set_xscale("log")
        left.set_yticks(y, [_shorten(v, 36) for v in labels])
        left.set_xlabel("Fisher ratio (dimensionless" + (", log scale)" if log_fisher else ")"))
        left.set_title("separation of the states (black: nominal 95 % interval)")
        lag = "" if lag_ps is None else f" at {lag_ps:g} ps"
        if all(v is None for v in rho):
            _no_data(right, "slowness not measured (no lag)")
        else:
            right.barh(y, [0.0 if v is None else v for v in rho], color="#999999", height=0.6)
            for yi, r in zip(y, top):
                _interval(right, yi, r.get("autocorrelation_ci"))
            right.axvline(0.0, color="black", lw=0.6)
        right.set_xlim(min([0.0] + [v for v in rho if v is not None]), 1.0)
        right.set_xlabel(f"autocorrelation{lag} (dimensionless)")
        right.set_title("slowness: 1 = does not relax within the lag")
        data = {"ids": [r["id"] for r in top], "labels": labels, "fisher_ratio": fisher,
                "fisher_ratio_ci": [r.get("fisher_ratio_ci") for r in top],
                "autocorrelation": rho,
                "autocorrelation_ci": [r.get("autocorrelation_ci") for r in top],
                "log_fisher": log_fisher}
        alt = (f"The best {len(top)} descriptors of the score card: Fisher ratio and "
               f"autocorrelation{lag} with nominal 95 % intervals; the best is "
               f"{labels[0] if labels else 'none'}"
               f" (Fisher ratio {_fmt(fisher[0] if fisher else None)}).")
        caption = (f"The pool: the best {len(top)} descriptors of the score card (best "
                   "separating first), how well each separates the states (Fisher ratio) and "
                   "how slowly it moves (autocorrelation at the lag). Every descriptor is in "
                   "scorecard.csv.")
        return _finish(fig, "pool-scores", caption, alt, data)


def redundancy_groups(groups):
    """What each representative stands for: one bar per redundancy group, its size.

    Parameters
    ----------
    groups : list of (str, list of str)
        ``(representative label, [labels of the descriptors it stands for])`` in
        score-card order.

    Returns
    -------
    Figure
        ``data``: ``representatives``, ``members``, ``sizes``.

    Examples
    --------
    >>> fig = redundancy_groups([("dihedral C7-C8-C9-C10", ["dist C7-C10"])])
    >>> fig.data["sizes"]
    [1]
    """
    shown = groups[:POOL_ROWS]
    y = np.arange(len(shown))[::-1]
    sizes = [len(m) for _, m in shown]
    with _style():
        fig, ((ax,),) = _new(7.2, 1.0 + 0.22 * max(len(shown), 2))
        ax.barh(y, sizes, color="#999999", height=0.6)
        for yi, (_, members), size in zip(y, shown, sizes):
            ax.text(size, yi, "  " + _shorten(", ".join(members), 90), va="center", fontsize=6.5)
        ax.set_yticks(y, [_shorten(r, 36) for r, _ in shown])
        ax.set_xlim(0, max(sizes + [1]) * 2.5)
        ax.xaxis.get_major_locator().set_params(integer=True)
        ax.set_xlabel("descriptors it stands for (count)")
        ax.set_title("redundancy groups: what each representative stands for")
        data = {"representatives": [r for r, _ in shown], "members": [m for _, m in shown],
                "sizes": sizes}
        alt = ("Redundancy groups: " + "; ".join(
            f"{r} stands for {', '.join(m)}" for r, m in shown) + ".")
        caption = ("Redundancy: each representative stands for descriptors that are strongly "
                   "correlated with it within the states and add nothing to it when combined; "
                   "a chemically nicer member can be swapped in for it.")
        return _finish(fig, "redundancy-groups", caption, alt, data)


# ------------------------------------------------------------------------- slow modes
def implied_timescales(curves, *, tica=None, within=None, crossing=False, biased=False,
                       longest_run_ps=None, longest_what="longest run"):
    """Implied timescales against the lag where they were computed.

    Parameters
    ----------
    curves : list of (str, list of float, list of float or None)
        Per ranked CV: ``(label, lag_ps, timescale_ps)``, all runs about their
        common mean; None where not defined. At most :data:`TIMESCALE_CVS` are
        drawn.
    tica : dict or None
        ``{"lag_ps": float, "timescales_ps": [float or None]}``: the slow
        coordinates of ``--runs`` at their lag (None: not finite), with optional
        ``"resolved"`` (per timescale: True, False when the runs are too short to
        resolve it, None unknown). A resolved one is drawn as a cross, one not
        resolved as a triangle at the longest run (it is only known to be longer); a
        None timescale not resolved is drawn so too, others with None are not drawn.
    within : list of (str, list of float, list of float or None), optional
        The same within runs (each run, a file's frames of one state, about its
        own mean), drawn in a second panel: the relaxation inside the basins,
        which the pooled timescales of runs that stay in their states do not
        show. A CV keeps its style and place in both panels.
    crossing : bool, default=False
        Whether the runs cross between the states (the caption then says what these
        curves, of pairs within one state, do not show).
    biased : bool, default=False
        Whether the runs are biased: the caption then says that lags and timescales
        are in rescaled time.
    longest_run_ps : float or None, optional
        The longest run (ps), drawn as a horizontal line in each panel: timescales
        above it are not resolved by the runs.
    longest_what : str, default="longest run"
        What `longest_run_ps` is, for the legend and caption (e.g. "longest run in one
        state": the pooled curves' pairs stay within one state, a visit of a labelled
        run).

    Returns
    -------
    Figure
        ``data``: ``curves`` (label -> lag_ps, timescale_ps), ``tica`` (with
        ``resolved``), ``within`` (label -> lag_ps, timescale_ps, or None),
        ``longest_run_ps``.

    Examples
    --------
    >>> fig = implied_timescales([("rank 1", [1.0, 2.0, 4.0], [50.0, 52.0, None])],
    ...                          within=[("rank 1", [1.0, 2.0, 4.0], [0.8, 0.9, None])])
    >>> fig.data["curves"]["rank 1"]["timescale_ps"], fig.data["within"]["rank 1"]["timescale_ps"]
    ([50.0, 52.0, None], [0.8, 0.9, None])
    """
    within = list(within or [])
    if not any(t is not None for w in within for t in w[2]):
        within = []  # nothing to draw: one panel
    with _style():
        fig, axes = _new(7.2, 3.6 if not within else 3.9, 1, 2 if within else 1)
        ax = axes[0][0]
        # a CV's style (and legend entry) follows its place among the pooled curves
        styles = {lab: st for (lab, _, _), st in zip(curves[:TIMESCALE_CVS], _CV_STYLES)}
        drawn, lags_seen = _timescale_curves(ax, curves, styles)
        tica_data = None
        if tica is not None:
            t = [None if v is None else float(v) for v in tica["timescales_ps"]]
            ok = tica_resolved(t, tica.get("resolved"), longest_run_ps)
            shown_t = [v for v, r in zip(t, ok) if v is not None and r is not False]
            if shown_t:
                ax.plot([tica["lag_ps"]] * len(shown_t), shown_t, linestyle="none",
                        marker="x", color="black", ms=6,
                        label=f"TICA at {tica['lag_ps']:g} ps (lower bounds on the "
                        "timescales)")
            beyond = sum(r is False for r in ok)
            if beyond and longest_run_ps is not None:
                ax.plot([tica["lag_ps"]] * beyond, [longest_run_ps] * beyond,
                        linestyle="none", marker="^", color="black", ms=6, fillstyle="none",
                        label=f"TICA at {tica['lag_ps']:g} ps, not resolved by these runs "
                        f"(> {longest_run_ps:.3g} ps)")
            tica_data = {"lag_ps": float(tica["lag_ps"]), "timescales_ps": t, "resolved": ok}
            lags_seen.append(float(tica["lag_ps"]))
        panels = [ax]
        _timescale_axes(ax, lags_seen, "all runs about their common mean" if within else
                        "implied timescales against the lag: a slow process gives a plateau")
        drawn_within = None
        if within:
            right = axes[0][1]
            drawn_within, seen = _timescale_curves(right, within, styles)
            _timescale_axes(right, seen, "within runs (each run about its own mean)")
            panels.append(right)
        if longest_run_ps is not None:
            for panel in panels:
                panel.axhline(longest_run_ps, color="#444444", lw=0.9, ls=(0, (4, 2)),
                              label=f"{longest_what} ({longest_run_ps:.3g} ps): longer "
                              "timescales are not resolved")
        # one legend for the panels, below them (inside, it hid the curves)
        handles, labels = ax.get_legend_handles_labels()
        fig.legend(handles, labels, loc="outside lower center",
                   ncols=4 if max(map(len, labels)) <= 40 else 2)
        data = {"curves": drawn, "tica": tica_data, "within": drawn_within,
                "longest_run_ps": None if longest_run_ps is None else float(longest_run_ps)}
        parts = [f"{lab}: " + ", ".join(f"{_fmt(t)} at {lg:g}" for lg, t in
                                        zip(v["lag_ps"], v["timescale_ps"]))
                 for lab, v in drawn.items()]
        if tica_data is not None:
            parts.append(f"TICA slow coordinates at {tica_data['lag_ps']:g}: " + ", ".join(
                _tica_text(t, r, longest_run_ps)
                for t, r in zip(tica_data["timescales_ps"], tica_data["resolved"])))
        alt = "Implied timescales in ps against the lag in ps: " + "; ".join(parts) + "."
        if longest_run_ps is not None:
            alt += f" The {longest_what}: {longest_run_ps:.3g} ps."
        if drawn_within:
            alt += " Within runs: " + "; ".join(
                f"{lab}: " + ", ".join(f"{_fmt(t)} at {lg:g}" for lg, t in
                                       zip(v["lag_ps"], v["timescale_ps"]))
                for lab, v in drawn_within.items()) + "."
        caption = ("Slow modes: the implied timescale -lag/ln(autocorrelation) of each ranked CV "
                   "(at most five) against the lag, all runs about their common mean; a "
                   "timescale that levels off as the lag grows is a real slow process, one below "
                   "the dotted line is not resolved. One that keeps growing with the lag is not "
                   "resolved either: runs that stay in their states keep a CV that separates them "
                   "correlated at every lag, so the crossing between the states is only known to "
                   "be slower than the runs.")
        if crossing:
            caption += (" Here runs cross between the states: these pairs stay within one "
                        "state (a visit of a labelled run), so the offsets between the states "
                        "make a separating CV's curve rise past any timescale of the "
                        "dynamics; its timescale along the crossing runs is the ranking's "
                        "transition timescale (timescale_transitions_ps).")
        if drawn_within:
            caption += (" Right: the same with each run (a file's frames of one state) about "
                        "its own mean, the relaxation of the CV inside the basins, free of "
                        "the offsets between them; the CV's integrated time in the ranking, "
                        "which sets the bias hints' deposition interval, comes from these "
                        "autocorrelations, taken state by state (the longest).")
        if longest_run_ps is not None:
            caption += (f" The dashed line is the {longest_what} ({longest_run_ps:.3g} ps): a "
                        "timescale above it is not resolved by these runs, only known to be "
                        "longer than what they show.")
        if tica_data is not None:
            caption += (" The crosses are TICA's implied timescales at its lag (--runs): lower "
                        "bounds on the true timescales given ample data, since a linear "
                        "combination of features relaxes at least as fast as the slowest "
                        "process (variational principle, No\u00e9 and N\u00fcske 2013); too "
                        "few frames for the features inflate them instead (the run summary "
                        "warns then), and the summary flags them when few transitions between "
                        "the proposed states back them.")
            if any(r is False for r in tica_data["resolved"]):
                caption += (" A triangle at the longest run marks a TICA timescale the runs "
                            "do not resolve: they show only that it is longer than they are. "
                            "TICA's timescales (ps): " + ", ".join(
                                _tica_text(t, r, longest_run_ps) for t, r in
                                zip(tica_data["timescales_ps"], tica_data["resolved"])) + ".")
        if biased:
            caption += (" The runs are biased: lags and timescales are in rescaled time (each "
                        "frame's step dt exp(V/kT)) and pairs weigh as their first frame, an "
                        "estimate of the unbiased dynamics that is exact only when the bias "
                        "vanishes at the barriers.")
            if not drawn_within:
                caption += (" No panel within runs: its lags are frames times the time step, "
                            "which is not the time of biased runs, so it is not computed for "
                            "them.")
        data["biased"] = bool(biased)
        return _finish(fig, "implied-timescales", caption, alt, data)


def _timescale_curves(ax, curves, styles):
    """Draw the ``(label, lag_ps, timescale_ps)`` curves whose label has a style in `styles`
    (label -> the ranked CV's style), in it; return what was drawn (label -> lag_ps,
    timescale_ps) and the lags' ends."""
    drawn, lags_seen = {}, []
    for lab, lags, ts in curves:
        if lab not in styles:
            continue
        col, ls, mk = styles[lab]
        lags = np.asarray(lags, dtype=np.float64)
        tsv = np.array([np.nan if t is None else t for t in ts], dtype=np.float64)
        if lags.shape != tsv.shape:
            raise ValueError(f"timescales of {lab}: lag_ps and timescale_ps must have the "
                             "same length")
        ax.plot(lags, tsv, color=col, ls=ls, marker=mk, ms=4, lw=1.2, label=lab)
        drawn[lab] = {"lag_ps": lags.tolist(), "timescale_ps": list(ts)}
        lags_seen += [float(lags.min()), float(lags.max())] if lags.size else []
    return drawn, lags_seen


def _timescale_axes(ax, lags_seen, title):
    """The timescale = lag diagonal, log scales (the lags are a geometric grid), labels and
    title of a panel."""
    lo = min(lags_seen) if lags_seen else 1.0
    hi = max(lags_seen) if lags_seen else 1.0
    diagonal = np.geomspace(lo, hi, 50) if hi > lo > 0 else np.array([lo])
    ax.plot(diagonal, diagonal, color="#999999", lw=0.8, ls=":",
            label="timescale = lag (shorter ones are not resolved)")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("lag (ps, log scale)")
    ax.set_ylabel("implied timescale (ps, log scale)")
    ax.set_title(title)


def tica_resolved(timescales_ps, resolved=None, longest_run_ps=None):
    """Per TICA timescale, whether the runs resolve it: `resolved` (the report data's
    ``timescales_resolved``) where given, else shorter than `longest_run_ps` (None: no
    timescale or no run length to judge).

    Examples
    --------
    >>> tica_resolved([581.0, 40.0, None], longest_run_ps=90.0)
    [False, True, None]
    >>> tica_resolved([581.0, None], [False, False])
    [False, False]
    """
    ts = list(timescales_ps or [])
    if resolved is not None:
        return [None if r is None else bool(r) for r in resolved][:len(ts)] + \
            [None] * max(0, len(ts) - len(resolved))
    return [None if t is None or longest_run_ps is None else bool(t < longest_run_ps)
            for t in ts]


def _tica_text(t, resolved, longest_run_ps):
    """A TICA timescale as the summary writes it: ``> 90 (not resolved by these runs)``
    when the runs do not resolve it."""
    if resolved is False and longest_run_ps is not None:
        return f"> {longest_run_ps:.3g} (not resolved by these runs)"
    return _fmt(t)


def tica_states(coords, labels, *, states, lag_ps, timescales_ps=None, n_slow=None,
                biased=False, longest_run_ps=None, resolved=None):
    """Frames in the two slowest TICA coordinates, coloured by proposed state.

    Parameters
    ----------
    coords : array-like of shape (n_frames, 2)
        The first two slow coordinates (kinetic map: dimensionless).
    labels : sequence of str
        The proposed state of each frame.
    states : sequence of str
        The states in order (for the colours).
    lag_ps : float
        The TICA lag, ps.
    timescales_ps : sequence of float or None, optional
        Implied timescales of the coordinates, ps (None: not finite); lower bounds
        on the true ones given ample data, as the axis labels say.
    n_slow : int or None, optional
        The coordinates the states were clustered in; a coordinate beyond it is
        labelled as faster than the lag and not used for the states. None: a
        coordinate counts as used unless its timescale is at most `lag_ps`.
    biased : bool, default=False
        Whether the runs are biased: the caption says the frames are drawn
        without their weights.
    longest_run_ps : float or None, optional
        The longest run, ps; with `resolved`, the report data's
        ``timescales_resolved``: a timescale the runs do not resolve is labelled
        "> longest run (not resolved by these runs)", as the summary writes it
        (:func:`tica_resolved`).

    Returns
    -------
    Figure
        ``data``: ``counts`` and ``centroids`` per state, ``used`` (per axis,
        whether the states were clustered in it) and ``axis_labels``.

    Examples
    --------
    >>> fig = tica_states([[0.0, 0.1], [1.0, 0.0], [1.2, 0.2]], ["S1", "S2", "S2"],
    ...                   states=["S1", "S2"], lag_ps=2.0)
    >>> fig.data["counts"], fig.data["centroids"]["S2"]
    ({'S1': 1, 'S2': 2}, [1.1, 0.1])

    A second coordinate faster than the lag (clustered in the first alone):

    >>> fig = tica_states([[0.0, 0.1], [1.0, 0.0]], ["S1", "S2"], states=["S1", "S2"],
    ...                   lag_ps=20.0, timescales_ps=[80.0, 12.7], n_slow=1)
    >>> fig.data["used"]
    [True, False]
    >>> print(fig.data["axis_labels"][1])
    TICA coordinate 2 (TICA timescale 12.7 ps):
    faster than the 20 ps lag, not used for the states

    A first coordinate slower than the runs are long:

    >>> fig = tica_states([[0.0, 0.1], [1.0, 0.0]], ["S1", "S2"], states=["S1", "S2"],
    ...                   lag_ps=0.6, timescales_ps=[581.0, 1.43], longest_run_ps=90.0)
    >>> print(fig.data["axis_labels"][0])
    slow coordinate 1 (dimensionless, kinetic map;
    timescale > 90 ps, not resolved by these runs)
    """
    xy = np.asarray(coords, dtype=np.float64).reshape(-1, 2)
    lab = np.asarray(list(labels), dtype=object)
    if lab.shape != (xy.shape[0],):
        raise ValueError("tica: one state per frame of coords is needed")
    unknown = sorted(set(lab.tolist()) - set(states))
    if unknown:
        raise ValueError(f"tica: unknown state {unknown[0]!r}")
    colors = state_colors(states)
    counts, centroids = {}, {}
    ts = list(timescales_ps or [])
    ok = tica_resolved(ts, resolved, longest_run_ps)

    def used(k):
        if n_slow is not None:
            return k < n_slow
        return not (len(ts) > k and ts[k] is not None and ts[k] <= lag_ps)

    def axis_label(k):
        known = len(ts) > k and ts[k] is not None
        if not used(k):
            return (f"TICA coordinate {k + 1}" + (f" (TICA timescale {ts[k]:.3g} ps)" if known
                                                  else "")
                    + f":\nfaster than the {lag_ps:g} ps lag, not used for the states")
        if len(ok) > k and ok[k] is False and longest_run_ps is not None:
            return (f"slow coordinate {k + 1} (dimensionless, kinetic map;\ntimescale > "
                    f"{longest_run_ps:.3g} ps, not resolved by these runs)")
        return (f"slow coordinate {k + 1} (dimensionless, kinetic map"
                + (f";\ntimescale \u2265 {ts[k]:.3g} ps, a lower bound)" if known else ")"))

    axis_labels = [axis_label(0), axis_label(1)]

    with _style():
        fig, ((ax,),) = _new(5.4, 4.2)
        for s in states:
            sel = lab == s
            counts[s] = int(sel.sum())
            if sel.any():
                centroids[s] = [round(float(v), 12) for v in xy[sel].mean(axis=0)]
                ax.scatter(xy[sel, 0], xy[sel, 1], s=3, color=colors[s], lw=0, label=s,
                           rasterized=True)
        ax.set_xlabel(axis_labels[0])
        ax.set_ylabel(axis_labels[1])
        ax.set_title(f"two slowest TICA coordinates (lag {lag_ps:g} ps), by proposed state")
        ax.legend(handles=[_legend_dot(colors[s]) for s in states], labels=list(states),
                  loc="best")
        data = {"counts": counts, "centroids": centroids,
                "colors": {s: colors[s] for s in states}, "used": [used(0), used(1)],
                "axis_labels": axis_labels, "resolved": ok[:2]}
        alt = (f"{xy.shape[0]} frames in the two slowest TICA coordinates at lag {lag_ps:g} ps, "
               "coloured by proposed state: " + ", ".join(
                   f"{s} {counts[s]} frames" for s in states) + ".")
        caption = ("Proposed states: frames of the runs (a subsample) in the two slowest TICA "
                   "coordinates, coloured by the state k-means gave them; well-separated "
                   "clouds are distinct slow states. The axes' timescales are TICA's, lower "
                   "bounds on the true ones given ample data (variational principle, "
                   "No\u00e9 and N\u00fcske 2013); too few frames for the features inflate "
                   "them (the run summary warns then).")
        if any(r is False for r in ok[:2]):
            caption += (f" An axis marked \u201cnot resolved\u201d has a TICA timescale longer "
                        f"than the longest run ({longest_run_ps:.3g} ps): the runs show only "
                        "that it is slower than they are, not how slow.")
        if not used(1):
            caption += (f" The vertical axis is a TICA coordinate faster than the {lag_ps:g} ps "
                        "lag, drawn to spread the points: the states were clustered in the "
                        "slow coordinate(s) alone, so their separation along it means nothing.")
        if biased:
            caption += (" The runs are biased: the points are frames as sampled, drawn without "
                        "their reweighting factors exp(V/kT), so their density is the biased "
                        "sampling's, not equilibrium's (TICA and the states' centres come from "
                        "the reweighted statistics).")
        return _finish(fig, "tica-states", caption, alt, data)


# ----------------------------------------------------------------------------- funnel
def funnel_positions(params, positions=None, *, state="bound"):
    """The funnel outline with the ligand positions in the restraint's own frame.

    Parameters
    ----------
    params : dict
        The funnel's shape keys (:data:`cvdesign.bias.funnel.SHAPE_KEYS`), from the
        spec's restraint entry.
    positions : dict or None
        ``{"z_nm": [...], "r_nm": [...]}``: the ligand centre along and across the axis,
        in the reference pocket's frame; None draws the outline alone.
    state : str, default="bound"
        The state of the positions (its colour is the first of :data:`PALETTE`).

    Returns
    -------
    Figure
        ``data``: ``n_positions``, ``inside`` (how many lie within the walls and the
        radius), ``params``.

    Examples
    --------
    >>> p = dict(lower_wall_z_nm=-0.5, upper_wall_z_nm=3.0, cone_end_z_nm=1.0,
    ...          cone_half_angle_rad=0.7, cylinder_radius_nm=0.4, blend_half_width_nm=0.1)
    >>> fig = funnel_positions(p, {"z_nm": [0.0, 0.1, 5.0], "r_nm": [0.1, 0.2, 0.1]})
    >>> fig.data["n_positions"], fig.data["inside"]
    (3, 2)
    """
    color = state_colors([state])[state]
    with _style():
        fig, ((ax,),) = _new(6.0, 3.6)
        draw_funnel(ax, params)
        n, inside = 0, None
        if positions is not None:
            z = np.asarray(positions["z_nm"], dtype=np.float64)
            r = np.asarray(positions["r_nm"], dtype=np.float64)
            if z.shape != r.shape or z.ndim != 1:
                raise ValueError("positions: z_nm and r_nm must be lists of the same length")
            n = int(z.size)
            radius, _ = funnel_radius(z, params)
            inside = int(np.sum((z >= params["lower_wall_z_nm"])
                                & (z <= params["upper_wall_z_nm"]) & (r <= radius)))
            ax.scatter(z, r, s=3, color=color, lw=0, rasterized=True,
                       label=f"ligand centre, {state} frames")
        ax.set_xlabel("z along the axis (nm, reference pocket frame)")
        ax.set_ylabel("r from the axis (nm)")
        ax.set_ylim(bottom=0.0)
        ax.set_title("funnel restraint (starting point to validate)")
        ax.legend(loc="best")
        data = {"n_positions": n, "inside": inside,
                "params": {k: float(params[k]) for k in sorted(params)
                           if isinstance(params[k], (int, float))}}
        alt = ("The funnel outline (radius against the position along the axis, in nm, with "
               "its walls)" + ("" if positions is None else
                               f" and {n} ligand positions, {inside} of them inside") + ".")
        caption = ("The funnel in the frame of the reference pocket: radius R(z) of the "
                   "cone and cylinder, the walls, and where the bound ligand centre was. The "
                   "bound positions should sit well inside.")
        return _finish(fig, "funnel", caption, alt, data)
