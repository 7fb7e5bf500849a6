"""The main job: from state trajectories to ranked CVs and spec files.

:func:`suggest` runs the data flow of the design:

1. **pool** -- select atoms, enumerate candidate descriptors, prefilter
   distances by a cutoff on a strided subset of frames;
2. **screening pass** -- per-state mean, variance, minimum and maximum of every
   feature (:class:`~cvdesign.moments.DiagonalMoments`), frame counts and time
   steps;
3. **statistics pass** -- per-state histograms of every feature (overlap), and
   per-state, per-fold full moments of the best-separating features;
4. **search** -- shortlist (drop near-duplicates), greedy forward search scored
   by held-out Fisher ratio, ranking with the one-standard-error rule;
5. **held-out pass** -- per-fold CV values of the ranked combinations, for a
   held-out overlap;
6. **specs** -- one engine-neutral spec per ranked combination.

Memory does not depend on trajectory length: each pass streams chunks and
keeps only mergeable statistics.
"""

import csv
import io
import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import __version__
from ._io import prepare_output_dir, write_dir_atomically
from .combine import FoldMoments, fit_direction, greedy_search, rank_combinations
from .estimators import rayleigh_quotient
from .errors import InputError
from .moments import DiagonalMoments, Moments, merge_all
from .pool import build_pool
from .redundancy import descriptor_correlation, redundancy_graph, representatives
from .scoring import Histograms, fisher_ratio, overlap_coefficient
from .source import file_sha256, stores_time

__all__ = ["suggest", "Suggestions", "CAUTION"]

#: Printed with, and stored in, every output that guides a simulation.
CAUTION = (
    "These CVs and numbers are starting points to validate, not guarantees: check "
    "that the CV separates your states in your own data, and that a biased run "
    "along it behaves, before relying on it."
)

_N_BINS = 50

#: Fewest frames of each state in each held-out fold; with fewer, the within-state
#: variance of a fold is too noisy to score on.
MIN_FRAMES_PER_FOLD = 10


def _note(progress, msg):
    if progress is not None:
        progress(msg)


@dataclass
class Suggestions:
    """Result of :func:`suggest`.

    Attributes
    ----------
    states : list of str
        State names, in input order.
    pool : cvdesign.pool.Pool
        The candidate pool after prefiltering.
    scorecard : list of dict
        One row per descriptor, best separating first (see :meth:`scorecard_csv`).
    ranking : list of dict
        Ranked combinations, best first; ``ranking[i]["spec"]`` names the spec file.
    specs : list of dict
        Spec documents, in ranking order.
    notes : list of str
        What was done: selection, pool sizes, prefilter, folds, shortlist.
    inputs : list of dict
        Per input file: path, state(s), frames, time step in ps.
    input_files : list of str
        Paths of every file read (topology included); :meth:`write` refuses
        to write over them.
    """

    states: list
    pool: object
    scorecard: list
    ranking: list
    specs: list
    notes: list = field(default_factory=list)
    inputs: list = field(default_factory=list)
    input_files: list = field(default_factory=list)

    # ----------------------------------------------------------- renderings
    def scorecard_csv(self):
        """The score card as CSV text."""
        cols = ["order", "id", "kind", "label", "atoms", "fisher_ratio", "overlap",
                "screened", "shortlisted", "stands_for", "note"]
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(cols)
        for i, row in enumerate(self.scorecard, 1):
            w.writerow([i, row["id"], row["kind"], row["label"],
                        " ".join(map(str, row["atoms"])), _fmt(row["fisher_ratio"]),
                        _fmt(row["overlap"]), int(row["screened"]), int(row["shortlisted"]),
                        " ".join(row["stands_for"]), row["note"]])
        return buf.getvalue()

    def ranking_csv(self):
        """The ranking as CSV text (one row per combination)."""
        cols = ["rank", "spec", "n_terms", "heldout_fisher_ratio", "heldout_fisher_ratio_se",
                "heldout_overlap", "fisher_ratio_all", "terms", "weights"]
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(cols)
        for r in self.ranking:
            w.writerow([r["rank"], r["spec"], r["n_terms"], _fmt(r["heldout_fisher_ratio"]),
                        _fmt(r["heldout_fisher_ratio_se"]), _fmt(r["heldout_overlap"]),
                        _fmt(r["fisher_ratio_all"]),
                        "; ".join(_term_name(t) for t in r["terms"]),
                        " ".join(_fmt(t["weight"]) for t in r["terms"])])
        return buf.getvalue()

    def ranking_json(self):
        """The ranking as JSON text."""
        return _dumps({"format": "cvdesign-ranking", "version": 1, "states": self.states,
                       "ranking": self.ranking, "caution": CAUTION})

    def top_table(self, n=5):
        """A plain-text table of the top `n` suggestions."""
        lines = [f"{'rank':>4}  {'spec':<11} {'terms':>5}  {'held-out J':>10}  "
                 f"{'overlap':>7}  descriptors"]
        for r in self.ranking[:n]:
            names = ", ".join(sorted({t["label"] for t in r["terms"]}, key=str))
            lines.append(f"{r['rank']:>4}  {r['spec']:<11} {r['n_terms']:>5}  "
                         f"{r['heldout_fisher_ratio']:>10.3g}  {r['heldout_overlap']:>7.3f}  "
                         f"{names}")
        return "\n".join(lines)

    def summary_md(self):
        """A short markdown summary of the run."""
        out = ["# cvdesign suggest: summary", ""]
        out.append(f"cvdesign {__version__}. States: "
                   + ", ".join(f"`{s}`" for s in self.states) + ".")
        out += ["", "## Inputs", "", "| file | state | frames | time step (ps) |",
                "| --- | --- | ---: | ---: |"]
        for inp in self.inputs:
            dt = "" if inp["timestep_ps"] is None else f"{inp['timestep_ps']:g}"
            out.append(f"| {inp['file']} | {', '.join(inp['states'])} | {inp['frames']} | {dt} |")
        out += ["", "## What was done", ""] + [f"- {n}" for n in self.notes]
        out += ["", "## Top suggestions", "",
                "Held-out J is the Fisher ratio (between-state over within-state variance "
                "of the CV) on frames not used to fit it; overlap is the histogram "
                "overlapping coefficient of the states along the CV on those frames "
                "(0 = fully separated, 1 = identical).", "",
                "| rank | spec | terms | held-out J | overlap | descriptors (weight) |",
                "| ---: | --- | ---: | ---: | ---: | --- |"]
        for r in self.ranking[:5]:
            terms = "; ".join(f"{_term_name(t)} ({t['weight']:+.3f})" for t in r["terms"])
            out.append(f"| {r['rank']} | {r['spec']} | {r['n_terms']} | "
                       f"{r['heldout_fisher_ratio']:.3g} ± {r['heldout_fisher_ratio_se']:.2g} | "
                       f"{r['heldout_overlap']:.3f} | {terms} |")
        out += ["", "Files: `ranking.csv`, `ranking.json`, `scorecard.csv` (every descriptor), "
                "`cv-NN.json` (one spec per suggestion; evaluate with `cvdesign apply`).",
                "", f"**Caution.** {CAUTION}", ""]
        return "\n".join(out)

    def write(self, out_dir, *, force=False):
        """Write every output into `out_dir`, all or nothing.

        Files are written into a temporary directory beside `out_dir`, which
        is then renamed onto it, so an interrupted run leaves no partial output.

        Parameters
        ----------
        out_dir : path-like
        force : bool, default=False
            Replace an existing non-empty directory.
        """
        out_dir = prepare_output_dir(out_dir, force=force, inputs=self.input_files,
                                     marker="ranking.json")
        files = {
            "ranking.csv": self.ranking_csv(),
            "ranking.json": self.ranking_json(),
            "scorecard.csv": self.scorecard_csv(),
            "summary.md": self.summary_md(),
        }
        for r, spec in zip(self.ranking, self.specs):
            files[r["spec"]] = _dumps(spec)
        write_dir_atomically(out_dir, files)
        return out_dir


def _term_name(t):
    return t["label"] if t["transform"] == "identity" else f"{t['transform']}({t['label']})"


def _fmt(x):
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return ""
    return f"{x:.6g}"


def _dumps(obj):
    return json.dumps(obj, indent=2, sort_keys=True, allow_nan=False) + "\n"


def output_inputs(source):
    """Every file a source reads (topology and trajectories)."""
    files = [str(p) for p in source.files()]
    if source.topology_path:
        files.append(source.topology_path)
    return files


# ---------------------------------------------------------------- fold assignment
class _Folds:
    """Assigns every frame to a fold: by trajectory, or by contiguous block."""

    def __init__(self, source, seg_counts, n_folds):
        self.n_states = source.n_states
        files_per_state = []
        for s in range(source.n_states):
            files = []
            for si, seg in enumerate(source.segments):
                if seg_counts[si, s] > 0 and seg.path not in files:
                    files.append(seg.path)
            files_per_state.append(files)
        min_files = min(len(f) for f in files_per_state)
        self.mode = "block"
        if min_files >= 2:
            k = min(n_folds, min_files)
            file_fold = [{p: i % k for i, p in enumerate(files)} for files in files_per_state]
            per_fold = np.zeros((source.n_states, k))
            for si, seg in enumerate(source.segments):
                for s in range(source.n_states):
                    if seg_counts[si, s]:
                        per_fold[s, file_fold[s][seg.path]] += seg_counts[si, s]
            if per_fold.min() >= MIN_FRAMES_PER_FOLD:
                self.mode, self.n_folds, self.file_fold = "trajectory", k, file_fold
        if self.mode == "block":
            totals = seg_counts.sum(axis=0)
            k = int(min(n_folds, totals.min() // MIN_FRAMES_PER_FOLD))
            if k < 2:
                s = int(np.argmin(totals))
                raise InputError(
                    f"state {source.states[s]!r} has only {int(totals[s])} frames; held-out "
                    f"scoring needs at least {2 * MIN_FRAMES_PER_FOLD} per state "
                    f"({MIN_FRAMES_PER_FOLD} in each of two folds); give more frames"
                )
            self.n_folds = k
        self.source = source
        self.seg_counts = seg_counts
        self._seen = np.zeros_like(seg_counts)

    def describe(self):
        if self.mode == "trajectory":
            return (f"held-out scoring: {self.n_folds}-fold cross-validation by whole "
                    "trajectories (each state's files are split among the folds)")
        return (f"held-out scoring: {self.n_folds}-fold cross-validation by contiguous "
                "blocks of each trajectory (a state has a single trajectory, or too few "
                f"frames per trajectory for whole-trajectory folds of at least "
                f"{MIN_FRAMES_PER_FOLD} frames)")

    def reset(self):
        self._seen[:] = 0

    def of(self, chunk):
        si = chunk.segment_index
        states = chunk.states
        folds = np.empty(states.shape[0], dtype=np.intp)
        if self.mode == "trajectory":
            path = self.source.segments[si].path
            for s in np.unique(states):
                folds[states == s] = self.file_fold[s][path]
            return folds
        for s in np.unique(states):
            rows = np.flatnonzero(states == s)
            rank = self._seen[si, s] + np.arange(rows.size)
            self._seen[si, s] += rows.size
            folds[rows] = (rank * self.n_folds) // self.seg_counts[si, s]
        return folds


# ---------------------------------------------------------------- the pipeline
def suggest(source, *, selection=None, kinds=("distance", "angle", "dihedral"), cutoff=1.0,
            prefilter_stride=10, max_terms=5, n_suggestions=10, screen_size=200,
            shortlist_size=40, max_correlation=0.95, n_folds=4, n_seeds=5, min_gain=0.01,
            shrinkage=1e-3, progress=None):
    """Rank compact linear CVs that separate the states of a source.

    Parameters
    ----------
    source : cvdesign.source.Source
        Topology and trajectories with at least two states.
    selection : str, default=None
        mdtraj atom selection for the pool; None: heavy atoms of the solute.
    kinds : sequence of {'distance', 'angle', 'dihedral'}
        Descriptor kinds in the pool.
    cutoff : float, default=1.0
        Distance prefilter, in nm: a pair is kept if its mean distance is below
        `cutoff` in at least one state.
    prefilter_stride : int, default=10
        The prefilter reads every `prefilter_stride`-th frame.
    max_terms : int, default=5
        Largest number of descriptors in a combination.
    n_suggestions : int, default=10
        Number of ranked combinations (and spec files).
    screen_size : int, default=200
        Descriptors, best separating first, whose full covariance is gathered.
    shortlist_size : int, default=40
        Descriptors the search may combine, after dropping near-duplicates.
    max_correlation : float, default=0.95
        A descriptor is a near-duplicate of a better one when the pooled
        within-state |correlation| of any of their features exceeds this.
    n_folds : int, default=4
        Folds of the held-out scoring (fewer when a state has fewer trajectories).
    n_seeds : int, default=5
        Greedy searches, each started from one of the best single descriptors.
    min_gain : float, default=0.01
        A search adds a descriptor only if it raises the held-out Fisher ratio
        by more than this fraction.
    shrinkage : float, default=1e-3
        LDA regularization of the within-state covariance of standardized
        features: ``(1 - a) S_w + a (tr S_w / p) I``.
    progress : callable, default=None
        Called with a message string at each stage.

    Returns
    -------
    Suggestions

    Raises
    ------
    InputError
        For fewer than two states, a state without frames, an empty pool, and
        the other input problems described in the messages.
    """
    _validate_options(max_terms=max_terms, n_suggestions=n_suggestions, screen_size=screen_size,
                      shortlist_size=shortlist_size, max_correlation=max_correlation,
                      n_folds=n_folds, n_seeds=n_seeds, shrinkage=shrinkage, min_gain=min_gain,
                      prefilter_stride=prefilter_stride)
    if source.n_states < 2:
        names = ", ".join(repr(s) for s in source.states) or "none"
        raise InputError(
            f"only one state was given ({names}); separating states needs at least two: "
            "give another with --state NAME FILE ..."
        )
    n_states = source.n_states
    priors = np.full(n_states, 1.0 / n_states)

    _note(progress, "building the candidate pool")
    pool = build_pool(source, selection=selection, kinds=kinds, cutoff=cutoff,
                      stride=prefilter_stride)
    notes = list(pool.notes)
    atoms = pool.atom_indices()
    n_feat = pool.n_features
    _note(progress, f"pool: {len(pool)} descriptors, {n_feat} features; screening pass")

    # ---- pass 1: diagonal moments, counts, time steps
    diag = [DiagonalMoments(n_feat) for _ in range(n_states)]
    seg_counts = np.zeros((len(source.segments), n_states), dtype=np.int64)
    timesteps = {}
    min_box = None
    chunk_size = _chunk_frames(source, n_feat)
    for chunk in source.iter_chunks(atom_indices=atoms, chunk_size=chunk_size):
        x = pool.features(chunk.trajectory, atom_indices=atoms)
        if chunk.trajectory.unitcell_vectors is not None:
            h = _box_heights(chunk.trajectory.unitcell_vectors).min()
            min_box = h if min_box is None else min(min_box, h)
        si = chunk.segment_index
        if si not in timesteps and chunk.trajectory.n_frames >= 2 and \
                stores_time(source.segments[si].path):
            t = chunk.trajectory.time
            df = chunk.frames[1] - chunk.frames[0]
            timesteps[si] = float(t[1] - t[0]) / float(df) if df else None
        for s in np.unique(chunk.states):
            rows = chunk.states == s
            diag[s] = diag[s].merge(DiagonalMoments.from_data(x[rows]))
            seg_counts[si, s] += int(rows.sum())
    empty = [source.states[s] for s in range(n_states) if diag[s].count == 0]
    if empty:
        raise InputError(f"state(s) {', '.join(map(repr, empty))} have no frames; check the "
                         "files and frame ranges given for them")
    inputs = _describe_inputs(source, seg_counts, timesteps)
    if min_box is not None:
        notes.append(f"periodic box: distances use the minimum image (smallest box height "
                     f"{min_box:.3g} nm)")
        is_dist = np.array([pool.descriptors[i].kind == "distance"
                            for i in pool.feature_descriptor], dtype=bool)
        if is_dist.any():
            longest = float(np.max([d.maximum[is_dist].max() for d in diag]))
            if longest > 0.5 * min_box:
                notes.append(f"warning: some distances reach {longest:.3g} nm, more than half "
                             f"the smallest box height ({min_box:.3g} nm), where the minimum "
                             "image folds them back; lower --cutoff or check the box")
    unknown = [i["file"] for i in inputs if i["timestep_ps"] is None]
    if unknown:
        notes.append("time step unknown for " + ", ".join(unknown[:5])
                     + (" ..." if len(unknown) > 5 else "")
                     + " (the format stores no times, or a single frame)")
    steps = {round(i["timestep_ps"], 9) for i in inputs if i["timestep_ps"] is not None}
    if len(steps) > 1:
        notes.append("time steps differ between files: "
                     + ", ".join(f"{s:g} ps" for s in sorted(steps))
                     + " (not used by this version's scores)")

    means = np.array([d.mean for d in diag])
    variances = np.array([d.variance for d in diag])
    center = priors @ means
    total_var = priors @ (variances + (means - center) ** 2)
    scale = np.sqrt(total_var)
    constant = ~(scale > 1e-12 * (1.0 + np.abs(center)))
    scale[constant] = 1.0
    fisher_feat = fisher_ratio(means, variances, priors)
    fisher_feat[constant] = 0.0
    fisher_feat = np.where(np.isfinite(fisher_feat), fisher_feat, 1e12)
    low = np.min([d.minimum for d in diag], axis=0)
    high = np.max([d.maximum for d in diag], axis=0)

    n_desc = len(pool)
    fisher_desc = np.zeros(n_desc)
    np.maximum.at(fisher_desc, pool.feature_descriptor, fisher_feat)
    order = sorted(range(n_desc), key=lambda i: (-fisher_desc[i], i))
    screened = [i for i in order if fisher_desc[i] > 0][:screen_size]
    if not screened:
        raise InputError("no descriptor differs between the states (every Fisher ratio is 0); "
                         "check that the trajectories of different states are not the same")
    # screened features, grouped by descriptor in screening order
    scr_feat = np.concatenate([pool.features_of([i]) for i in screened])

    folds = _Folds(source, seg_counts, n_folds)
    notes.append(folds.describe())
    _note(progress, f"statistics pass ({len(screened)} descriptors screened)")

    # ---- pass 2: histograms of all features, fold moments of screened features
    hist = Histograms(low, high, n_states=n_states, n_bins=_N_BINS)
    fold_m = [[Moments(scr_feat.size) for _ in range(folds.n_folds)] for _ in range(n_states)]
    folds.reset()
    for chunk in source.iter_chunks(atom_indices=atoms, chunk_size=chunk_size):
        x = pool.features(chunk.trajectory, atom_indices=atoms)
        hist.add(x, chunk.states)
        f = folds.of(chunk)
        xs = x[:, scr_feat]
        for s in np.unique(chunk.states):
            for k in np.unique(f[chunk.states == s]):
                rows = (chunk.states == s) & (f == k)
                fold_m[s][k] = fold_m[s][k].merge(Moments.from_data(xs[rows]))
    for s in range(n_states):
        for k in range(folds.n_folds):
            if fold_m[s][k].count == 0:
                raise InputError(f"state {source.states[s]!r} has no frames in held-out fold "
                                 f"{k + 1} of {folds.n_folds}; give more frames or trajectories")
    overlap_feat = overlap_coefficient(hist.counts)
    overlap_desc = np.ones(n_desc)
    np.minimum.at(overlap_desc, pool.feature_descriptor, overlap_feat)

    fm = FoldMoments(fold_m, priors).standardized(center[scr_feat], scale[scr_feat])
    # local feature groups per screened descriptor
    groups, pos = [], 0
    for i in screened:
        n = len(pool.descriptors[i].transforms)
        groups.append(np.arange(pos, pos + n))
        pos += n

    # ---- shortlist: one representative per group of redundant descriptors
    pooled = fm.pooled()
    within = np.tensordot(priors, np.array([m.covariance for m in pooled]), axes=1)
    dcorr = descriptor_correlation(within, groups)
    graph = redundancy_graph(dcorr, max_correlation)
    reps = representatives(graph, {g: -float(g) for g in range(len(screened))})
    notes_by_desc, stands_for = {}, {}
    for rep, others in reps:
        stands_for[screened[rep]] = [pool.descriptors[screened[o]].id for o in others]
        for o in others:
            notes_by_desc[screened[o]] = (
                f"represented by {pool.descriptors[screened[rep]].id} "
                f"(|r|={dcorr[rep, o]:.3f})")
    short = [rep for rep, _ in reps][:shortlist_size]
    n_red = sum(len(o) for _, o in reps)
    notes.append(f"redundancy: {n_red} of the {len(screened)} best separating descriptors are "
                 f"represented by a better one (pooled within-state |r| > {max_correlation:g}, "
                 f"connected components of the correlation graph); shortlist: {len(short)} "
                 "representatives")
    _note(progress, f"searching combinations of up to {max_terms} of {len(short)} descriptors")

    sub_groups = [groups[g] for g in short]
    combos = greedy_search(fm, sub_groups, max_terms=max_terms, n_seeds=n_seeds,
                           min_gain=min_gain, shrinkage=shrinkage)
    ranked = rank_combinations(combos, limit=n_suggestions)
    notes.append(f"ranking: {len(combos)} combinations found by greedy forward search from the "
                 f"{min(n_seeds, len(short))} best single descriptors (a term is added only "
                 f"if it raises the held-out Fisher ratio by more than {min_gain:.0%}), "
                 "ranked by held-out Fisher ratio with the one-standard-error rule; LDA "
                 f"with shrinkage {shrinkage:g}, equal state weights")

    # ---- final fits on all data, and per-fold directions for the held-out pass
    fits = []
    for comb in ranked:
        gidx = [short[m] for m in comb.members]
        idx = np.concatenate([groups[g] for g in gidx])
        w = fit_direction(pooled, idx, priors, shrinkage)
        mu = np.array([m.mean[idx] for m in pooled])
        if mu[-1] @ w < mu[0] @ w:
            w = -w
        fold_w = []
        for k in range(fm.n_folds):
            wk = fit_direction(fm.train(k), idx, priors, shrinkage)
            if wk @ w < 0:
                wk = -wk
            fold_w.append(wk)
        fits.append((gidx, idx, w, fold_w))

    _note(progress, "held-out pass")
    heldout_overlap = _heldout_overlap(source, pool, screened, scr_feat, center, scale, fits,
                                       fm, folds, priors)

    # ---- outputs
    scorecard = []
    screened_set = set(screened)
    for i in order:
        d = pool.descriptors[i]
        scorecard.append({
            "id": d.id, "kind": d.kind, "label": d.label, "atoms": list(d.atoms),
            "fisher_ratio": float(fisher_desc[i]), "overlap": _finite(overlap_desc[i]),
            "screened": i in screened_set, "shortlisted": False,
            "stands_for": stands_for.get(i, []),
            "note": notes_by_desc.get(i, ""),
        })
    short_ids = {pool.descriptors[screened[g]].id for g in short}
    for row in scorecard:
        row["shortlisted"] = row["id"] in short_ids

    ranking, specs = [], []
    params = {"selection": selection, "kinds": list(kinds), "cutoff_nm": _finite(cutoff),
              "prefilter_stride": prefilter_stride, "max_terms": max_terms,
              "screen_size": screen_size, "shortlist_size": shortlist_size,
              "max_correlation": max_correlation, "n_folds": folds.n_folds,
              "n_seeds": n_seeds, "min_gain": min_gain,
              "fold_mode": folds.mode, "shrinkage": shrinkage}
    checksums = [{"file": Path(p).name, "sha256": file_sha256(p),
                  "states": next(i["states"] for i in inputs if i["path"] == str(p))}
                 for p in source.files()]
    for rank, (comb, (gidx, idx, w, _), ov) in enumerate(zip(ranked, fits, heldout_overlap), 1):
        terms = []
        local = 0
        for g in gidx:
            desc = pool.descriptors[screened[g]]
            for t, fi in zip(desc.transforms, groups[g]):
                gf = scr_feat[fi]
                terms.append({"descriptor": desc.id, "label": desc.label, "kind": desc.kind,
                              "atoms": list(desc.atoms), "transform": t,
                              "center": float(center[gf]), "scale": float(scale[gf]),
                              "weight": float(w[local])})
                local += 1
        state_stats = {}
        for s, m in enumerate(pooled):
            mean = float(m.mean[idx] @ w)
            var = float(w @ m.covariance[np.ix_(idx, idx)] @ w)
            state_stats[source.states[s]] = {"mean": mean, "std": math.sqrt(max(var, 0.0)),
                                             "n_frames": int(round(m.count))}
        mu = np.array([m.mean[idx] for m in pooled])
        cov = np.array([m.covariance[np.ix_(idx, idx)] for m in pooled])
        j_all = rayleigh_quotient(w, mu, cov, priors)
        name = f"cv-{rank:02d}.json"
        entry = {"rank": rank, "spec": name, "n_terms": comb.n_terms, "method": "lda",
                 "heldout_fisher_ratio": comb.score, "heldout_fisher_ratio_se": comb.se,
                 "heldout_fisher_ratio_folds": [float(v) for v in comb.fold_scores],
                 "heldout_overlap": _finite(ov), "fisher_ratio_all": _finite(j_all),
                 "states": state_stats, "terms": terms}
        ranking.append(entry)
        specs.append(_spec_dict(source, pool, name, entry, params, checksums))
    return Suggestions(states=list(source.states), pool=pool, scorecard=scorecard,
                       ranking=ranking, specs=specs, notes=notes, inputs=inputs,
                       input_files=output_inputs(source))


def _box_heights(vectors):
    """Perpendicular heights (nm) of boxes given as row vectors, shape (n, 3)."""
    v = np.asarray(vectors, dtype=np.float64)
    vol = np.abs(np.linalg.det(v))
    out = np.empty(v.shape[:2])
    for i, (j, k) in enumerate(((1, 2), (2, 0), (0, 1))):
        out[:, i] = vol / np.linalg.norm(np.cross(v[:, j], v[:, k]), axis=1)
    return out


def _chunk_frames(source, n_features, budget=2_000_000):
    """Frames per chunk so that a chunk's feature matrix stays near `budget` numbers."""
    return int(min(source.chunk_size, max(8, budget // max(1, n_features))))


def _finite(x):
    x = float(x)
    return x if math.isfinite(x) else None


def _validate_options(**kw):
    ints = {"max_terms": 1, "n_suggestions": 1, "screen_size": 1, "shortlist_size": 1,
            "n_folds": 2, "n_seeds": 1, "prefilter_stride": 1}
    for name, lo in ints.items():
        v = kw[name]
        if not isinstance(v, (int, np.integer)) or v < lo:
            raise InputError(f"{name}={v!r} must be an integer of at least {lo}")
    if not 0 < kw["max_correlation"] <= 1:
        raise InputError(f"max_correlation={kw['max_correlation']!r} must be in (0, 1]")
    if not kw["min_gain"] >= 0:
        raise InputError(f"min_gain={kw['min_gain']!r} must be non-negative")
    if not 0 <= kw["shrinkage"] <= 1:
        raise InputError(f"shrinkage={kw['shrinkage']!r} must be in [0, 1]")


def _describe_inputs(source, seg_counts, timesteps):
    out = {}
    for si, seg in enumerate(source.segments):
        key = str(seg.path)
        row = out.setdefault(key, {"path": key, "file": seg.path.name, "states": [],
                                   "frames": 0, "timestep_ps": timesteps.get(si)})
        for s in np.flatnonzero(seg_counts[si]):
            if source.states[s] not in row["states"]:
                row["states"].append(source.states[s])
        row["frames"] += int(seg_counts[si].sum())
        if row["timestep_ps"] is None:
            row["timestep_ps"] = timesteps.get(si)
    return list(out.values())


def _heldout_overlap(source, pool, screened, scr_feat, center, scale, fits, fm, folds, priors):
    """Mean over folds of the held-out overlap of each ranked combination."""
    need = sorted({screened[g] for gidx, *_ in fits for g in gidx})
    sub = pool.subset(need)
    sub_atoms = sub.atom_indices()
    # map screened-local feature index -> column in the subset pool's features
    col_of = {}
    for j, i in enumerate(need):
        for fi_sub, fi_pool in zip(sub.features_of([j]), pool.features_of([i])):
            col_of[fi_pool] = fi_sub
    n_folds = folds.n_folds
    plans = []
    for gidx, idx, w, fold_w in fits:
        cols = np.array([col_of[scr_feat[i]] for i in idx])
        c = center[scr_feat[idx]]
        sc = scale[scr_feat[idx]]
        ranges = []
        for k in range(n_folds):
            test = fm.test(k)
            mu = np.array([m.mean[idx] @ fold_w[k] for m in test])
            sd = np.array([math.sqrt(max(fold_w[k] @ m.covariance[np.ix_(idx, idx)] @ fold_w[k],
                                         0.0)) for m in test])
            lo, hi = float(np.min(mu - 5 * sd)), float(np.max(mu + 5 * sd))
            if not hi > lo:
                lo, hi = lo - 1.0, hi + 1.0
            ranges.append((lo, hi))
        plans.append((cols, c, sc, fold_w, ranges))
    counts = np.zeros((len(fits), n_folds, source.n_states, _N_BINS))
    folds.reset()
    for chunk in source.iter_chunks(atom_indices=sub_atoms,
                                    chunk_size=_chunk_frames(source, sub.n_features)):
        x = sub.features(chunk.trajectory, atom_indices=sub_atoms)
        f = folds.of(chunk)
        for ci, (cols, c, sc, fold_w, ranges) in enumerate(plans):
            z = (x[:, cols] - c) / sc
            for k in np.unique(f):
                rows = f == k
                v = z[rows] @ fold_w[k]
                lo, hi = ranges[k]
                b = np.clip(np.floor((v - lo) / (hi - lo) * _N_BINS).astype(np.intp), 0,
                            _N_BINS - 1)
                for s in np.unique(chunk.states[rows]):
                    bs = b[chunk.states[rows] == s]
                    counts[ci, k, s] += np.bincount(bs, minlength=_N_BINS)
    out = []
    for ci in range(len(fits)):
        per_fold = [overlap_coefficient(counts[ci, k][:, None, :])[0] for k in range(n_folds)]
        out.append(float(np.mean(per_fold)))
    return out


def _topology_provenance(source):
    if source.topology_path is None:
        return {"file": None, "sha256": None}
    return {"file": Path(source.topology_path).name, "sha256": file_sha256(source.topology_path)}


def _segments_provenance(source):
    """Which frames of which file were given to which state."""
    out = []
    for seg in source.segments:
        row = {"file": seg.path.name}
        if seg.labels is None:
            row.update({"state": seg.state, "start": seg.start, "stop": seg.stop})
        else:
            labels = [x for x in seg.labels]
            counts = {}
            for x in labels:
                if x is not None:
                    counts[x] = counts.get(x, 0) + 1
            row.update({"labels": {"n_frames": len(labels), "frames_per_state": counts,
                                   "sha256": _labels_sha256(labels)}})
        out.append(row)
    return out


def _labels_sha256(labels):
    import hashlib

    text = "\n".join("" if x is None else str(x) for x in labels)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _spec_dict(source, pool, name, entry, params, checksums):
    from .spec import atom_identity, residue_hashes, topology_fingerprint

    top = source.topology
    seen, descriptors = set(), []
    for t in entry["terms"]:
        if t["descriptor"] in seen:
            continue
        seen.add(t["descriptor"])
        descriptors.append({
            "id": t["descriptor"], "kind": t["kind"], "atoms": t["atoms"], "label": t["label"],
            "atom_identities": [atom_identity(top, a) for a in t["atoms"]],
            "periodic": t["kind"] == "dihedral",
        })
    terms = [{"descriptor": t["descriptor"], "transform": t["transform"], "center": t["center"],
              "scale": t["scale"], "weight": t["weight"]} for t in entry["terms"]]
    scores = {"heldout_fisher_ratio": entry["heldout_fisher_ratio"],
              "heldout_fisher_ratio_se": entry["heldout_fisher_ratio_se"],
              "rank": entry["rank"]}
    for key in ("heldout_overlap", "fisher_ratio_all"):
        if entry[key] is not None:
            scores[key] = entry[key]
    return {
        "format": "cvdesign-spec", "version": 1, "name": name[:-5],
        "units": {"length": "nm", "angle": "rad", "time": "ps", "energy": "kJ/mol"},
        "topology": {"n_atoms": top.n_atoms, "fingerprint": topology_fingerprint(top),
                     "residues": residue_hashes(top)},
        "descriptors": descriptors, "terms": terms, "offset": 0.0, "periodic": False,
        "states": entry["states"], "scores": scores,
        "provenance": {"cvdesign_version": __version__, "method": "lda",
                       "inputs": [{"file": c["file"], "sha256": c["sha256"],
                                   "state": ",".join(c["states"]) or None} for c in checksums],
                       "seed": None, "parameters": params,
                       "topology": _topology_provenance(source),
                       "segments": _segments_provenance(source)},
        "caution": CAUTION,
    }
