"""Tutorial 2: read the report of a run, figure by figure, and what to conclude from each.

Run it with

    python tutorials/02_reading_the_report.py [OUT_DIR]

OUT_DIR is where the outputs are written (default: a temporary directory that is
removed at the end). It takes some tens of seconds on two CPU cores. The script

1. runs `cvdesign.suggest` on the bundled demo (with a small bootstrap, so that
   the intervals exist) and writes the output directory, `report-data.json`
   included;
2. writes `report.html` from that directory alone (what `cvdesign report DIR`
   does: no trajectory is read again) and lists its figures;
3. walks through the figures in page order, reading the numbers each one draws
   from `ranking.json`, `scorecard.csv` and `report-data.json`, and prints what
   they say:
   - the held-out histograms of each ranked CV (does it split the states on frames
     the fit never saw?) and -kT ln p per state (how wide each basin is; not the
     barrier between them);
   - the CV along time in each input file (does it stay in its state's range?);
   - the terms' weights with their intervals and selection frequencies (which
     descriptors carry the CV, and how firmly);
   - the pool's best descriptors and the redundancy groups;
   - the implied timescales against the lag (is there a plateau, or do the runs
     not resolve the slow process?).

Open OUT_DIR/report.html in a browser to see the same figures. The demo is an
invented 12-atom molecule ("latch") with one slow torsion C3-C4-C5-C6: closed near
0 rad, open near pi rad (see data/README.md). Units: nm, rad, ps, kJ/mol, K; the CV
is in "CV units" (a weighted sum of standardized descriptors).
"""

import csv
import json
import math
import sys
import tempfile
from pathlib import Path

import numpy as np

import cvdesign
from cvdesign.constants import BOLTZMANN_KJ_MOL_K
from cvdesign.io.demo import demo_data_dir
from cvdesign.report import build_report, read_output, write_report


def histogram_stats(edges, counts):
    """Mean and standard deviation (CV units) of a histogram, from its bin centres."""
    edges, counts = np.asarray(edges), np.asarray(counts, dtype=float)
    centres = 0.5 * (edges[1:] + edges[:-1])
    mean = counts @ centres / counts.sum()
    return mean, math.sqrt(counts @ (centres - mean) ** 2 / counts.sum())


def overlap(edges, a, b):
    """Overlapping coefficient of two histograms on the same bins: the area both share
    (0: disjoint, 1: identical)."""
    a, b = np.asarray(a, dtype=float), np.asarray(b, dtype=float)
    return float(np.minimum(a / a.sum(), b / b.sum()).sum())


def main(out_dir, keep=True):
    # ------------------------------------------------------------------ 1. run
    data = demo_data_dir()
    manifest = json.loads((data / "manifest.json").read_text(encoding="utf-8"))
    topology = str(data / manifest["topology"]["file"])
    states = {name: [str(data / f) for f in entry["files"]]
              for name, entry in manifest["states"].items()}
    source = cvdesign.Source.from_states(topology, states)
    # 20 bootstrap replicates keep the run short; the default (200) gives steadier
    # intervals. Temperature 300 K: the -kT ln p profiles below are in kJ/mol at it.
    result = cvdesign.suggest(source, max_terms=3, n_suggestions=3, n_bootstrap=20,
                              temperature=300.0, seed=0)
    out = Path(result.write(out_dir, force=True))
    print(f"wrote {', '.join(sorted(p.name for p in out.iterdir()))} to {out}/")

    # ------------------------------------------------------------------ 2. the report
    # The page is made from the directory's files alone; the same files give the same
    # bytes (run `cvdesign report OUT_DIR` to rebuild it).
    page = write_report(out)
    report = build_report(read_output(out))
    print(f"\nwrote {page.name}: {len(report.figures)} figures, "
          f"{len(report.missing)} marked 'not available'")
    for fig in report.figures:
        print(f"  - {fig.name}")

    ranking = json.loads((out / "ranking.json").read_text(encoding="utf-8"))
    rdata = json.loads((out / "report-data.json").read_text(encoding="utf-8"))
    names = ranking["states"]
    kt = BOLTZMANN_KJ_MOL_K * rdata["temperature_k"]

    # ------------------------------------------------------------------ 3a. histograms
    # Each fold's frames are projected on the direction fitted WITHOUT that fold, then
    # placed in CV units; so these histograms show how the CV does on data it never
    # saw. Compare them with the spec's means and spreads (all frames, final fit): if
    # they agree, the CV did not just memorize its training frames.
    print("\nFigure: held-out histograms per state (CV units)")
    overlaps = []
    for r, cv in zip(ranking["ranking"], rdata["cvs"]):
        h = cv["heldout"]
        print(f"  {r['spec']} (held-out J {r['heldout_fisher_ratio']:.3g}):")
        for s in names:
            mean, std = histogram_stats(h["edges"], h["counts"][s])
            ref = r["states"][s]
            print(f"    {s:>6}: held-out {mean:+.3f} ± {std:.3f};  spec {ref['mean']:+.3f} "
                  f"± {ref['std']:.3f};  frames outside the bins: {sum(h['outside'][s])}")
        a, b = (r["states"][s] for s in names[:2])
        gap = abs(b["mean"] - a["mean"]) / math.sqrt(0.5 * (a["std"] ** 2 + b["std"] ** 2))
        overlaps.append(overlap(h["edges"], *(h["counts"][s] for s in names)))
        print(f"    the states lie {gap:.1f} pooled standard deviations apart; held-out "
              f"overlap of the histograms {overlaps[-1]:.3f} (ranking, per-fold bins: "
              f"{r['heldout_overlap']:.3f})")
    split = [r["spec"] for r, o in zip(ranking["ranking"], overlaps) if o < 0.05]
    print(f"  Conclusion: {len(split)} of {len(overlaps)} ranked CVs split the states on "
          f"held-out frames (overlap below 0.05: {', '.join(split) or 'none'}); the best "
          f"overlap is {min(overlaps):.3f}.")

    # -kT ln p of each state's own histogram, shifted to 0 at its minimum. It tells
    # how wide each basin is along the CV (the width at 1 kT), NOT the barrier between
    # the states: no unbiased frame visits the region between them, so the bins there
    # are empty and the curve simply stops.
    cv1 = rdata["cvs"][0]
    edges = np.asarray(cv1["heldout"]["edges"])
    centres = 0.5 * (edges[1:] + edges[:-1])
    print(f"\nFigure: -kT ln p per state along {cv1['spec']} (kT = {kt:.3f} kJ/mol at "
          f"{rdata['temperature_k']:g} K)")
    for s in names:
        c = np.asarray(cv1["heldout"]["counts"][s], dtype=float)
        seen = c > 0
        f = -kt * np.log(c[seen] / c.sum())
        f -= f.min()
        within = centres[seen][f <= kt]
        print(f"    {s:>6}: drawn over {seen.sum()} bins, up to {f.max():.1f} kJ/mol; "
              f"within 1 kT of its minimum from {within.min():+.3f} to {within.max():+.3f}")
    empty = np.flatnonzero(sum(np.asarray(cv1["heldout"]["counts"][s]) for s in names) == 0)
    print(f"    {empty.size} of {centres.size} bins between and around the states hold no "
          "frame: the barrier is not sampled, so read these curves as basin shapes, not "
          "as a free-energy profile of the transition (a biased run measures that).")

    # ------------------------------------------------------------------ 3b. traces
    # The CV along time in each input file (every frame up to 1000 per file, then
    # evenly thinned by frame number), coloured by state. A good CV stays in its
    # state's band within a run and jumps only when the state changes.
    print(f"\nFigure: {cv1['spec']} along time in each input file")
    ref = ranking["ranking"][0]["states"]
    means = np.array([ref[s]["mean"] for s in names])
    crossings = 0
    for tr in cv1["traces"]:
        v = np.asarray(tr["value"])
        s = tr["state"][0]
        inside = np.abs(v - ref[s]["mean"]) <= 4 * ref[s]["std"]
        # points nearer another state's mean than their own
        nearest = np.asarray(names)[np.argmin(np.abs(v[:, None] - means[None]), axis=1)]
        away = int(np.sum(nearest != np.asarray(tr["state"])))
        crossings += away
        step = tr["frame"][1] - tr["frame"][0]
        print(f"    {tr['file']:>12} ({s}): {v.size} points (every {step} frame(s), "
              f"{tr['time_ps'][-1]:.0f} ps), {inside.mean():.1%} within 4 std of the "
              f"state's mean, {away} nearer another state's mean")
    if crossings == 0:
        print("  Conclusion: every run stays in its own state's band: the CV is steady within "
              "a state, and these data hold no transition (each demo run stays in the state "
              "it was started in).")
    else:
        print(f"  Conclusion: {crossings} points sit nearer another state: look at those "
              "stretches (a transition, or a CV that mixes the states there).")

    # ------------------------------------------------------------------ 3c. weights
    # The weights apply to standardized descriptors, so their sizes compare directly.
    # A (nominal) 95 % interval that crosses zero, or a term that bootstrap refits of the search
    # seldom keep, is not well determined by the data.
    print("\nFigure: weights of the terms, with nominal 95 % intervals and selection frequencies")
    for r in ranking["ranking"]:
        for t in r["terms"]:
            name = t["label"] if t["transform"] == "identity" else \
                f"{t['transform']}({t['label']})"
            lo, hi = t.get("weight_ci") or (None, None)
            firm = "interval excludes 0" if lo is not None and lo * hi > 0 else \
                "interval crosses 0 (not determined)"
            sel = t.get("selection_frequency")
            print(f"    {r['spec']} {name:>34}: {t['weight']:+.3f} "
                  f"[{lo:+.3f}, {hi:+.3f}], {firm}; kept in "
                  + ("n/a" if sel is None else f"{sel:.0%}") + " of refits")
    print("  Selection counts descriptors (the cos and sin of a dihedral together); a term "
          "whose interval crosses zero adds nothing that the data pin down.")

    # ------------------------------------------------------------------ 3d. the pool
    with open(out / "scorecard.csv", encoding="utf-8") as fh:
        card = list(csv.DictReader(fh))
    print("\nFigure: the pool's best descriptors (Fisher ratio; autocorrelation at "
          f"{ranking['lag_ps']:g} ps: all runs about one mean, and within runs)")
    for row in card[:5]:
        print(f"    {row['label']:>28}: Fisher ratio {float(row['fisher_ratio']):9.3g}, "
              f"autocorrelation {float(row['autocorrelation']):.3f}, within runs "
              f"{float(row['autocorrelation_within_runs']):+.3f}")
    print("  The all-runs autocorrelation is near 1 because each run stays in one state; "
          "within runs it is near 0: inside a state the descriptors relax fast.")
    label = {row["id"]: row["label"] for row in card}
    groups = [(row["label"], [label[m] for m in row["stands_for"].split()])
              for row in card if row["stands_for"]]
    print("\nFigure: redundancy groups (a representative and the descriptors it stands for: "
          "strongly correlated within the states, adding nothing when combined)")
    for rep, members in groups:
        print(f"    {rep} stands for {', '.join(members)}")

    # ------------------------------------------------------------------ 3e. timescales
    # The implied timescale -lag / ln(autocorrelation) of each CV against the lag. A
    # real slow process gives a plateau; a timescale that keeps growing with the lag
    # (and exceeds the runs) says the runs do not resolve the process.
    print("\nFigure: implied timescales against the lag (ps)")
    longest = ranking["ranking"][0]["longest_run_ps"]
    growing = 0
    for cv in rdata["cvs"]:
        t = cv["timescales"]
        lags, ts = np.asarray(t["lag_ps"]), np.asarray(t["timescale_ps"], dtype=float)
        # a plateau: over the last half of the lags (in log), the timescale grows by less
        # than a third as fast as the lag itself
        half = lags >= math.sqrt(lags[0] * lags[-1])
        slope = np.polyfit(np.log(lags[half]), np.log(ts[half]), 1)[0]
        growing += bool(slope > 0.33 or ts[-1] > longest)
        print(f"    {cv['spec']}: {ts[0]:.3g} ps at {lags[0]:g} ps lag, {ts[-1]:.3g} ps at "
              f"{lags[-1]:g} ps lag (grows as lag^{slope:.2f} at the long lags)")
    if growing:
        print(f"  Conclusion: {growing} CV(s) show no plateau, or timescales beyond the longest "
              f"run ({longest:g} ps): the runs do not resolve the slow process (they hold no "
              "transition), so it is only known to be slower than the runs. Runs that cross "
              "between the states would measure it.")
    else:
        print("  Conclusion: every CV levels off at a timescale the runs resolve.")
    # The right panel: each run about its own mean, the relaxation inside the basins. Its
    # autocorrelations, integrated, give the CV's integrated time in the ranking, from which
    # the bias hints take the deposition interval.
    first, entry = rdata["cvs"][0], ranking["ranking"][0]
    within = (first["timescales"] or {}).get("timescale_within_runs_ps") or [None]
    tau, spacing = entry["integrated_time_ps"], entry["frame_spacing_ps"]
    if within[0] is not None and tau is not None:  # (None: not defined for this data)
        print(f"    within runs, {first['spec']}: {within[0]:.3g} ps at "
              f"{first['timescales']['lag_ps'][0]:g} ps lag; its integrated time "
              f"{tau:.3g} ps, with frames {spacing:g} ps apart"
              + (": shorter than the spacing, so the frames do not resolve it (the hints "
                 "say so)" if tau < spacing else ""))

    print("\nNot in this demo: with --runs the report adds the frames in the two slowest "
          "TICA coordinates coloured by proposed state, and 'cvdesign funnel' writes a "
          "report with the ligand positions inside the funnel.")
    print(f"\nCaution: {ranking['caution']}")
    if keep:
        print(f"\nOpen {page} in a browser to see the figures.")
    else:
        print("\n(the outputs were written to a temporary directory, now removed; give an "
              "OUT_DIR to keep them)")


if __name__ == "__main__":
    if len(sys.argv) > 2:
        sys.exit("usage: python tutorials/02_reading_the_report.py [OUT_DIR]")
    if len(sys.argv) == 2:
        main(sys.argv[1])
    else:
        with tempfile.TemporaryDirectory() as tmp:
            main(Path(tmp) / "cv-report", keep=False)
