"""Unlabelled exploratory runs: find the slow coordinates, propose metastable states.

When no state labels are known, :func:`propose_states`

1. builds the candidate pool and screens it by each feature's normalized
   autocorrelation at the lag (within-trajectory: lagged pairs never span a
   file or a gap);
2. fits TICA (reversible estimate) on the screened features and reads the
   implied timescales; when every timescale is shorter than the lag the runs
   show no slow process at that lag, and it says so instead of inventing states;
3. projects every frame on the slow TICA coordinates (those slower than the
   lag, at most three, in kinetic-map scaling) and clusters the projections
   with k-means (scikit-learn), choosing the number of states by the largest
   mean silhouette (Rousseeuw 1987) between 2 and ``max_states`` unless it is
   given -- the silhouette rewards compact, well-separated groups, as
   metastable states are, where a likelihood criterion would split one
   non-Gaussian basin into several;
4. reports each proposed state's population and a representative frame.

The proposed labels then feed the labelled pipeline
(:func:`cvdesign.pipeline.suggest`) through :meth:`Exploration.labelled_source`.
"""

import math
from dataclasses import dataclass, field

import numpy as np
from sklearn.cluster import KMeans
from sklearn.metrics import silhouette_score

from .combine import standardize_lagged
from .errors import InputError
from .estimators import TICA
from .moments import DiagonalMoments
from .pipeline import _chunk_frames, _lag_frames, _Series, read_timesteps
from .pool import build_pool
from .source import Source

__all__ = ["propose_states", "Exploration", "MIN_SILHOUETTE"]

#: Smallest mean silhouette accepted as metastable structure. Kaufman and Rousseeuw
#: (*Finding Groups in Data*, 1990) read 0.51-0.70 as "a reasonable structure" and
#: below 0.5 as weak or artificial (from memory).
MIN_SILHOUETTE = 0.5


@dataclass
class Exploration:
    """Proposed metastable states of unlabelled runs.

    Attributes
    ----------
    states : list of str
        Names of the proposed states, ``S1``, ``S2``, ... ordered along the
        slowest TICA coordinate.
    labels : dict of str to ndarray
        Per run file, the state name of every frame (object array).
    populations : dict of str to float
        Fraction of all frames in each state.
    representatives : dict of str to dict
        Per state, ``{"file", "frame"}`` of the frame nearest to the state's
        centre in the slow coordinates.
    timescales_ps : list of float
        Implied timescales of the TICA components, slowest first, ps.
    lag_ps : float
    n_slow : int
        Slow coordinates used for clustering.
    criterion : dict
        ``{"name": "silhouette" or "given", "values": {n_states: mean silhouette}}``.
    notes : list of str
    """

    states: list
    labels: dict
    populations: dict
    representatives: dict
    timescales_ps: list
    lag_ps: float
    n_slow: int
    criterion: dict
    notes: list = field(default_factory=list)
    longest_run_ps: float = None

    def labelled_source(self, topology, *, chunk_size=500, timestep=None):
        """A :class:`~cvdesign.source.Source` of the runs with the proposed labels."""
        src = Source(topology, chunk_size=chunk_size, timestep=timestep)
        for path, labels in self.labels.items():
            src.add_labelled(path, labels)
        # keep the proposed order S1, S2, ... whatever the order of first appearance
        src.states = [s for s in self.states if s in src.states]
        return src

    def states_csv(self):
        """Per-frame proposed states as CSV text (file, frame, state)."""
        lines = ["file,frame,state"]
        names = [str(p).replace("\\", "/").rsplit("/", 1)[-1] for p in self.labels]
        unique = len(set(names)) == len(names)
        for (path, labels), name in zip(self.labels.items(), names):
            shown = name if unique else str(path)
            lines.extend(f"{shown},{i},{s}" for i, s in enumerate(labels))
        return "\n".join(lines) + "\n"

    def summary_lines(self):
        """Markdown lines describing the proposed states."""
        out = ["## Proposed states (unlabelled runs)", "",
               f"TICA at lag {self.lag_ps:g} ps; implied timescales (ps): "
               + ", ".join(_fmt_ts(t) if self.longest_run_ps is None or t < self.longest_run_ps
                           else f"> {self.longest_run_ps:.3g} (not resolved by these runs)"
                           for t in self.timescales_ps[:6])
               + f". Clustered in the {self.n_slow} slowest coordinate(s) (kinetic map) with "
               "k-means; number of states "
               + ("given." if self.criterion["name"] == "given" else
                  "chosen by the largest mean silhouette ("
                  + ", ".join(f"{k}: {v:.3f}" for k, v in self.criterion["values"].items())
                  + ")."), "",
               "| state | population | representative frame |", "| --- | ---: | --- |"]
        for s in self.states:
            r = self.representatives[s]
            out.append(f"| {s} | {self.populations[s]:.3f} | {r['file']} frame {r['frame']} |")
        return out + [""] + [f"- {n}" for n in self.notes] + [""]


def _fmt_ts(t):
    return "inf" if math.isinf(t) else ("nan" if math.isnan(t) else f"{t:.3g}")


def propose_states(source, *, lag, n_states=None, max_states=6, selection=None,
                   kinds=("distance", "angle", "dihedral"), cutoff=1.0, prefilter_stride=10,
                   coordination_r0=0.45, screen_size=200, max_slow=3, seed=0, progress=None):
    """Propose metastable states of unlabelled runs from their slow coordinates.

    Parameters
    ----------
    source : cvdesign.source.Source
        The runs, all under one state name (labels are ignored).
    lag : float
        Lag time, ps.
    n_states : int, default=None
        Number of states; None chooses it by the mean silhouette, between 2
        and `max_states`.
    max_states : int, default=6
    selection, kinds, cutoff, prefilter_stride, coordination_r0
        As in :func:`cvdesign.pipeline.suggest`.
    screen_size : int, default=200
        Features (most autocorrelated first) entering TICA.
    max_slow : int, default=3
        Largest number of slow coordinates clustered.
    seed : int, default=0
        Seed of the k-means initializations.
    progress : callable, default=None

    Returns
    -------
    Exploration

    Raises
    ------
    InputError
        When the runs show no slow process at the lag, or for bad input.

    Examples
    --------
    On the bundled demo runs, without their labels::

        from cvdesign import Source
        from cvdesign.explore import propose_states
        src = Source("latch.pdb")
        for f in ["closed-1.xtc", "open-1.xtc"]:
            src.add(f, "runs")
        exploration = propose_states(src, lag=2.0)
        print(exploration.populations)
    """
    if not (isinstance(lag, (int, float)) and math.isfinite(lag) and lag > 0):
        raise InputError(f"lag={lag!r} must be a positive time in ps (give --lag PS)")
    if n_states is not None and (not isinstance(n_states, int) or n_states < 2):
        raise InputError(f"n_states={n_states!r} must be an integer of at least 2")
    note = progress or (lambda msg: None)
    timesteps = read_timesteps(source)
    lag_frames = _lag_frames(source, lag, timesteps)
    note("building the candidate pool")
    pool = build_pool(source, selection=selection, kinds=kinds, cutoff=cutoff,
                      stride=prefilter_stride, coordination_r0=coordination_r0)
    atoms = pool.atom_indices()
    n_feat = pool.n_features
    chunk = _chunk_frames(source, n_feat)
    note(f"pool: {len(pool)} descriptors; screening by autocorrelation at {lag:g} ps")

    # pass 1: variances and lag-autocorrelation of every feature
    diag = DiagonalMoments(n_feat)
    lag1 = None
    for c in source.iter_chunks(atom_indices=atoms, chunk_size=chunk):
        x = pool.features(c.trajectory, atom_indices=atoms)
        if lag1 is None:
            lag1 = _Series(n_feat, x[0].copy(), diagonal=True)
        diag = diag.merge(DiagonalMoments.from_data(x))
        lag1.feed(c.segment_index, c.frames, x, lag_frames[c.segment_index])
    if lag1 is None or lag1.moments().count == 0:
        raise InputError(f"no lagged pairs at lag {lag:g} ps: every run is shorter than the "
                         "lag; choose a shorter --lag")
    rho = np.nan_to_num(lag1.moments().autocorrelation(), nan=0.0)
    center, scale = diag.mean, np.sqrt(diag.variance)
    constant = ~(scale > 1e-12 * (1.0 + np.abs(center)))
    rho[constant] = 0.0
    scale[constant] = 1.0
    order = sorted(range(n_feat), key=lambda j: (-rho[j], j))
    feats = np.array(sorted(j for j in order[:screen_size] if rho[j] > 0), dtype=np.intp)
    if feats.size == 0:
        raise InputError(f"no feature is correlated across the lag of {lag:g} ps; the runs show "
                         "no slow process at this lag: choose a shorter --lag or longer runs")

    # pass 2: full lagged moments of the screened features -> TICA
    lag2 = _Series(feats.size, center[feats], diagonal=False)
    for c in source.iter_chunks(atom_indices=atoms, chunk_size=chunk):
        x = pool.features(c.trajectory, atom_indices=atoms)[:, feats]
        lag2.feed(c.segment_index, c.frames, x, lag_frames[c.segment_index])
    lagged = standardize_lagged(lag2.moments(), center[feats], scale[feats])
    tica = TICA.from_moments(lagged, lag=1, rcond=1e-6)
    ts_ps = (tica.timescales_ * lag).tolist()  # from_moments used lag=1 (one lag unit)
    notes = [f"TICA on the {feats.size} most autocorrelated features "
             f"({tica.n_dropped_} near-singular directions dropped, eigenvalue below 1e-6 of "
             "the largest)"]
    slow = [i for i, t in enumerate(ts_ps) if (math.isinf(t) or t > lag)]
    if not slow:
        raise InputError(
            f"the runs show no slow process at lag {lag:g} ps: every implied timescale "
            f"({', '.join(_fmt_ts(t) for t in ts_ps[:5])} ps) is shorter than the lag, so "
            "nothing stays correlated long enough to tell metastable states apart. Use a "
            "shorter --lag, longer runs, or give the states yourself with --state")
    n_slow = min(max_slow, len(slow))
    comps = tica.eigenvectors_[:, :n_slow]

    # pass 3: project every frame on the slow coordinates
    proj, frames_of = {}, {}
    for c in source.iter_chunks(atom_indices=atoms, chunk_size=chunk):
        x = pool.features(c.trajectory, atom_indices=atoms)[:, feats]
        z = ((x - center[feats]) / scale[feats] - tica.mean_) @ comps
        proj.setdefault(c.segment_index, []).append(z)
        frames_of.setdefault(c.segment_index, []).append(c.frames)
    keys = sorted(proj)
    # kinetic-map scaling (Noé and Clementi 2015): each slow coordinate weighted by its
    # eigenvalue, so barely-slow ones count less in the clustering
    y = np.concatenate([np.concatenate(proj[k]) for k in keys]) * tica.eigenvalues_[:n_slow]
    # the clustering sees at most 20,000 evenly spaced frames (deterministic), the
    # silhouette at most 4,000 of those
    fit_y = y[::max(1, y.shape[0] // 20000)]
    sil_y = fit_y[::max(1, fit_y.shape[0] // 4000)]

    def cluster(k):
        return KMeans(n_clusters=k, n_init=10, random_state=seed).fit(fit_y)

    if n_states is None:
        scores, best = {}, None
        for k in range(2, max_states + 1):
            if sil_y.shape[0] <= k:
                break
            km = cluster(k)
            labels_k = km.predict(sil_y)
            if len(set(labels_k.tolist())) < 2:
                continue
            scores[k] = float(silhouette_score(sil_y, labels_k))
            if best is None or scores[k] > scores[best[0]] + 1e-12:
                best = (k, km)
        if best is None:
            raise InputError("too few distinct frames to propose states; give longer runs")
        if scores[best[0]] < MIN_SILHOUETTE:
            raise InputError(
                f"no metastable structure found: the best clustering of the slow coordinates "
                f"({best[0]} groups) has a mean silhouette of only {scores[best[0]]:.2f}, below "
                f"{MIN_SILHOUETTE} (below that, groups are not clearly separated; Kaufman and "
                "Rousseeuw 1990). The runs may sample a single state at this lag; give the "
                "states with --state, or use longer runs")
        k, gm = best
        criterion = {"name": "silhouette", "values": scores}
    else:
        k, gm = n_states, cluster(n_states)
        criterion = {"name": "given", "values": {}}
    raw = gm.predict(y)
    # name states S1, S2, ... along the slowest coordinate
    order_c = np.argsort(gm.cluster_centers_[:, 0], kind="stable")
    rename = {int(c): i for i, c in enumerate(order_c)}
    names = [f"S{i + 1}" for i in range(k)]
    lab = np.array([rename[int(c)] for c in raw])
    used = sorted(set(lab.tolist()))
    if len(used) < 2:
        raise InputError("the clustering put every frame into one state; the runs may sample "
                         "a single metastable state at this lag. Give the states with --state")
    labels, pos = {}, 0
    reps = {}
    best_d = {}
    means = gm.cluster_centers_[order_c]
    for key in keys:
        n = sum(len(f) for f in frames_of[key])
        seg = source.segments[key]
        fr = np.concatenate(frames_of[key])
        arr = np.full(int(fr.max()) + 1 if fr.size else 0, None, dtype=object)
        arr[fr] = np.array([names[i] for i in lab[pos:pos + n]], dtype=object)
        labels[str(seg.path)] = arr
        d = np.linalg.norm(y[pos:pos + n] - means[lab[pos:pos + n]], axis=1)
        for i in np.unique(lab[pos:pos + n]):
            rows = np.flatnonzero(lab[pos:pos + n] == i)
            j = rows[np.argmin(d[rows])]
            if names[i] not in best_d or d[j] < best_d[names[i]]:
                best_d[names[i]] = d[j]
                reps[names[i]] = {"file": seg.path.name, "frame": int(fr[j])}
        pos += n
    states = [names[i] for i in used]
    pops = {names[i]: float(np.mean(lab == i)) for i in used}
    notes.append(f"{len(states)} states proposed from {y.shape[0]} frames "
                 f"(k-means fitted on {fit_y.shape[0]}, silhouette on {sil_y.shape[0]})")
    lengths = [len(np.concatenate(frames_of[k])) * timesteps[k] for k in keys
               if timesteps.get(k) is not None]
    return Exploration(states=states, labels=labels, populations=pops, representatives=reps,
                       timescales_ps=ts_ps, lag_ps=float(lag), n_slow=n_slow,
                       criterion=criterion, notes=notes,
                       longest_run_ps=float(max(lengths)) if lengths else None)
