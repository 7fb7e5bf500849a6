"""Slowness from the transition data (issue 12, item 6): runs that cross between the states.

The toy: two coordinates, each the distance of a particle from an anchor. ``x`` is the
testbed's double well (cvdesign.testbed.wells: overdamped Langevin, the static bias that
vanishes at the barrier); ``y`` is fast noise (AR(1), a fraction of a frame's memory) whose
mean follows the well only in the short basin-only runs, not along the biased runs that
cross. Both separate the basins of the basin-only data about equally well and both move
fast within the basins, so basin-only data cannot tell them apart; along the crossing runs
``x`` is slow (it stays in a well between crossings) and ``y`` is not.
"""

import csv
import json
import math
import re
from pathlib import Path

import mdtraj as md
import numpy as np
import pytest

from cvdesign import Source, suggest
from cvdesign.passes import Featurizer, FoldMomentsPass, Folds, LaggedPass, run_pass
from cvdesign.pipeline.suggest import _offsets_hold_autocorrelation
from cvdesign.pipeline.transitions import (MIN_CROSSINGS_PER_FOLD, crossings,
                                           gather_transitions)
from cvdesign.search import FoldMoments, fold_scores
from cvdesign.testbed.wells import DoubleWell

FRAME_PS = 0.05  # the wells' frame spacing (25 steps of 2 fs)
LAG_PS = 0.5
CORE_NM = 0.5    # basin cores: |x| > 0.5 nm
Y_MEANS = (1.0, 2.0)  # y's mean in the basin-only runs of the left and right wells, nm
Y_CROSSING = 1.5      # and along the crossing runs
Y_SD, Y_MEMORY = 0.09, 0.3


class TwoCoordinates(Featurizer):
    """Features x and y of the toy (module level: it pickles)."""

    atom_indices = np.array([1, 3])
    n_features = 2

    def __call__(self, trajectory):
        return trajectory.xyz[:, :, 0].astype(np.float64) - np.array([-1.8, 0.0])


def _fast(rng, n, mean):
    """AR(1) noise about `mean` (nm): memory Y_MEMORY per frame, standard deviation Y_SD."""
    e = rng.normal(0.0, Y_SD * math.sqrt(1 - Y_MEMORY ** 2), n)
    out = np.empty(n)
    out[0] = rng.normal(0.0, Y_SD)
    for t in range(1, n):
        out[t] = Y_MEMORY * out[t - 1] + e[t]
    return out + mean


def _save(path, x, y):
    """Anchor 0 at (-1.8, 0, 0), particle 1 at (x, 0, 0), anchor 2 at (0, 0, 10), particle 3
    at (y, 0, 10) nm: the two distances x + 1.8 and y, far from each other."""
    xyz = np.zeros((x.size, 4, 3), dtype=np.float32)
    xyz[:, 0, 0], xyz[:, 1, 0] = -1.8, x
    xyz[:, 2, 2] = xyz[:, 3, 2] = 10.0
    xyz[:, 3, 0] = y
    top = md.Topology()
    res = top.add_residue("TWO", top.add_chain())
    for i in range(4):
        top.add_atom(f"C{i}", md.element.carbon, res)
    traj = md.Trajectory(xyz, top, time=np.arange(x.size) * FRAME_PS)
    traj.save_xtc(str(path))
    return top, traj


def _labels(x):
    return np.where(x < -CORE_NM, "left", np.where(x > CORE_NM, "right", None))


def write_toy(out, *, n_crossing_frames=2000, n_crossing_runs=2, seed=3):
    """Basin-only runs (3 per well, unbiased, each staying in its well) and biased runs that
    cross, with their bias energies; returns a dict of paths and labels."""
    well = DoubleWell()
    rng = np.random.default_rng(seed)
    short = well.run(100, 200, md_step_ps=2e-3, stride=25, biased=False, seed=seed + 1)
    basin = {"left": [], "right": []}
    for x in short:
        name = "left" if (x < 0).all() else "right" if (x > 0).all() else None
        if name is not None and len(basin[name]) < 3:
            basin[name].append(x)
    assert all(len(v) == 3 for v in basin.values())
    files = {"left": [], "right": []}
    for s, name in enumerate(("left", "right")):
        for i, x in enumerate(basin[name]):
            path = out / f"{name}-{i}.xtc"
            top, traj = _save(path, x, _fast(rng, x.size, Y_MEANS[s]))
            # a state may not mix biased and unbiased runs: bias energies of zero
            (out / f"{name}-{i}.bias").write_text("bias\n" + "0.0\n" * x.size)
            files[name].append(str(path))
    pdb = out / "two.pdb"
    traj[:1].save_pdb(str(pdb))
    crossing = []
    runs = well.run(n_crossing_runs, n_crossing_frames, md_step_ps=2e-3, stride=25, biased=True,
                    seed=seed + 2)
    for i, x in enumerate(runs):
        path = out / f"biased-{i}.xtc"
        _save(path, x, _fast(rng, x.size, Y_CROSSING))
        # the bias of the positions as the file stores them (XTC rounds to 1e-3 nm)
        stored = md.load(str(path), top=top).xyz[:, 1, 0].astype(np.float64)
        bias = out / f"biased-{i}.bias"
        bias.write_text("bias\n" + "".join(f"{v!r}\n" for v in well.bias(stored).tolist()))
        labels = out / f"biased-{i}.labels"
        lab = _labels(stored)
        labels.write_text("".join(f"{'-' if v is None else v}\n" for v in lab))
        crossing.append((str(path), str(bias), str(labels), lab))
    return {"pdb": str(pdb), "basin": files, "crossing": crossing, "well": well}


@pytest.fixture(scope="module")
def toy(tmp_path_factory):
    return write_toy(tmp_path_factory.mktemp("transit"))


def _source(toy, *, crossing=True, runs=None):
    src = Source(toy["pdb"], temperature=toy["well"].temperature)
    for name, paths in toy["basin"].items():
        for p in paths:
            src.add(p, name, bias=p[:-4] + ".bias" if crossing else None)
    if crossing:
        for path, bias, _, lab in toy["crossing"][:runs]:
            src.add_labelled(path, lab, bias=bias)
    return src


def test_crossings_are_changes_of_state_between_labelled_frames():
    assert crossings(["a", None, "a", "b", None, None, "a", None]) == [(2, 3), (3, 6)]
    assert crossings([None, "a", "a", None]) == []


def test_transition_slowness_ranks_the_true_coordinate_where_basin_data_cannot(toy):
    """Objective 'both' on the same state statistics (the basin-only runs): with the
    within-state slowness the two coordinates score alike (both fast inside the wells);
    with the crossing runs' transition slowness, x scores well above y."""
    basin_only = _source(toy, crossing=False)
    feats = TwoCoordinates()
    folds = Folds(3)
    lag = int(round(LAG_PS / FRAME_PS))
    moments, lagged = run_pass((FoldMomentsPass(feats, folds),
                                LaggedPass(feats, lag, folds=folds)), basin_only)
    crossing = _source(toy)
    lags = {si: lag for si in range(len(crossing.segments))}
    transit = gather_transitions(crossing, feats, np.zeros(2), lags, folds.n_folds)
    assert transit.ranks and transit.per_fold.min() >= MIN_CROSSINGS_PER_FOLD
    # each state's pairs about its own mean (the basin-only data's slowness)
    within = FoldMoments(moments, None, lagged.by_state_fold())
    both = FoldMoments(moments, None, lagged.by_state_fold(), transit.by_fold(2))
    assert within.slowness == "within_states" and both.slowness == "transitions"
    rho_in = [[float(within.within_test(k).covariances(reversible=True)[2][i, i]
                     / within.within_test(k).covariances(reversible=True)[1][i, i])
               for k in range(3)] for i in range(2)]
    rho_tr = [[float(both.transition_test(k).covariances(reversible=True)[2][i, i]
                     / both.transition_test(k).covariances(reversible=True)[1][i, i])
               for k in range(3)] for i in range(2)]
    assert max(abs(v) for row in rho_in for v in row) < 0.2  # both fast within the wells
    assert min(rho_tr[0]) > 0.6 and max(abs(v) for v in rho_tr[1]) < 0.2
    plain = [fold_scores(within, [i], objective="both") for i in range(2)]
    transit_scores = [fold_scores(both, [i], objective="both") for i in range(2)]
    # basin-only: the two scores differ by less than their fold-to-fold scatter
    gap = abs(plain[0].mean() - plain[1].mean())
    assert gap < 0.05 and gap < plain[0].std(ddof=1) + plain[1].std(ddof=1) + 0.02
    # transitions: x above y in every fold, by far
    assert (transit_scores[0] - transit_scores[1] > 0.25).all(), transit_scores


def test_suggest_ranks_on_transition_slowness_and_says_so(toy):
    src = _source(toy)
    result = suggest(src, objective="both", lag=LAG_PS, n_bootstrap=20, max_terms=1,
                     n_suggestions=2, kinds=("distance",), cutoff=5.0, n_folds=3, seed=1)
    top, second = result.ranking[0], result.ranking[1]
    assert top["slowness_ranked_on"] == "transitions"
    assert top["terms"][0]["atoms"] == [0, 1] and second["terms"][0]["atoms"] == [2, 3]
    assert top["heldout_autocorrelation_transitions"] > 0.6
    assert abs(second["heldout_autocorrelation_transitions"]) < 0.2
    lo, hi = top["autocorrelation_transitions_ci"]
    assert lo <= top["autocorrelation_transitions"] <= hi
    assert top["timescale_transitions_ci_ps"][0] <= top["timescale_transitions_ps"]
    assert any(n.startswith("objective 'both' ranks on the transition slowness")
               for n in result.notes)
    assert "slowness_ranked_on" in result.ranking_csv().splitlines()[0]
    # the refits behind the held-out score's interval resample the crossing runs too
    assert sum("also resample the crossing runs' sub-blocks" in n for n in result.notes) == 1
    # pairs within one state cover at most a visit of a labelled run: their timescales are
    # resolved only below the longest visit (a review found them marked resolved against
    # the whole file), those along the crossing runs below the longest run
    assert 0 < top["longest_visit_ps"] < top["longest_run_ps"]
    for key, bound in (("timescale", "longest_visit_ps"),
                       ("timescale_within_states", "longest_visit_ps"),
                       ("timescale_transitions", "longest_run_ps")):
        held = key == "timescale" and _offsets_hold_autocorrelation(top)
        assert top[f"{key}_resolved"] == (top[f"{key}_ps"] < top[bound] and not held), key


def test_refit_intervals_carry_the_noise_of_the_crossing_runs(toy, monkeypatch):
    """The held-out score's interval with the crossing runs' sub-blocks resampled in the
    refits, against the same bootstrap with them held fixed: the noise of the transition
    slowness widens it (the summary says which was done)."""
    import cvdesign.pipeline.suggest as pipeline

    kwargs = dict(objective="both", lag=LAG_PS, n_bootstrap=20, max_terms=1, n_suggestions=2,
                  kinds=("distance",), cutoff=5.0, n_folds=3, seed=1)
    resampled = suggest(_source(toy), **kwargs)
    real = pipeline.bootstrap_ranked
    monkeypatch.setattr(pipeline, "bootstrap_ranked",
                        lambda *a: real(*a[:8], None))  # crossing runs held fixed
    fixed = suggest(_source(toy), **kwargs)
    assert any("keep the crossing runs' lagged pairs fixed" in n for n in fixed.notes)
    assert not any("keep the crossing runs' lagged pairs fixed" in n for n in resampled.notes)
    width = [[r["heldout_score_ci"][1] - r["heldout_score_ci"][0] for r in res.ranking]
             for res in (resampled, fixed)]
    assert width[0][0] > width[1][0] > 0


def test_too_few_crossings_fall_back_to_within_state_slowness_and_say_so(toy, tmp_path):
    """One short crossing run: fewer than MIN_CROSSINGS_PER_FOLD crossings in a fold."""
    path, bias, _, lab = toy["crossing"][0]
    n = next(b for a, b in crossings(list(lab))[1:2]) + 5  # about two crossings
    traj = md.load(path, top=toy["pdb"])[:n]
    short = tmp_path / "short.xtc"
    traj.save_xtc(str(short))
    energies = np.loadtxt(bias, skiprows=1)[:n].tolist()
    (tmp_path / "short.bias").write_text("bias\n" + "".join(f"{v!r}\n" for v in energies))
    src = _source(toy, runs=0)  # the basin-only runs, with their bias energies of zero
    src.add_labelled(str(short), lab[:n], bias=str(tmp_path / "short.bias"))
    result = suggest(src, objective="both", lag=LAG_PS, n_bootstrap=0, max_terms=1,
                     n_suggestions=2, kinds=("distance",), cutoff=5.0, n_folds=3, seed=1)
    assert all(r["slowness_ranked_on"] == "within_states" for r in result.ranking)
    assert all(r["heldout_autocorrelation_transitions"] is not None or
               r["autocorrelation_transitions"] is not None for r in result.ranking)
    note = next(n for n in result.notes if "transition slowness not used for ranking" in n)
    assert f"fewer than {MIN_CROSSINGS_PER_FOLD} crossings" in note


def _cli_args(toy, out, labelled):
    """suggest's arguments: the basin-only runs by state, the crossing runs whose index is in
    `labelled` with their labels files, every run with its bias energies."""
    args = ["suggest", "--topology", toy["pdb"]]
    for name, paths in toy["basin"].items():
        args += ["--state", name, *paths]
    for p in (p for paths in toy["basin"].values() for p in paths):
        args += ["--bias-energy", p, p[:-4] + ".bias"]
    for i, (path, bias, labels, _) in enumerate(toy["crossing"]):
        args += ["--bias-energy", path, bias]
        args += ["--labelled", path, labels] if i in labelled else []
    return args + ["--temperature", "300", "--lag", str(LAG_PS), "--objective", "both",
                   "--kinds", "distance", "--cutoff", "5", "--folds", "3", "--max-terms", "1",
                   "--suggestions", "2", "--bootstrap", "0", "--no-report", "--quiet",
                   "--out", str(out)]


def test_cli_labelled_biased_runs_rank_on_transition_slowness(toy, tmp_path, capsys):
    """--labelled TRAJ LABELS gives a run's per-frame states (a labels file, '-' between the
    states); the outputs say which slowness ranked and hold the transition columns."""
    from cvdesign.cli import main

    args = [a for a in _cli_args(toy, tmp_path / "out", (0, 1)) if a != "--no-report"]
    assert main(args) == 0
    assert "autocorr: held-out, along the runs that cross" in capsys.readouterr().out
    rows = list(csv.DictReader((tmp_path / "out" / "ranking.csv").open()))
    assert [r["slowness_ranked_on"] for r in rows] == ["transitions", "transitions"]
    assert float(rows[0]["heldout_autocorrelation_transitions"]) > 0.6
    assert rows[0]["terms"].endswith("C0-C1")
    summary = (tmp_path / "out" / "summary.md").read_text()
    assert ("along the runs that cross between the states (runs given with per-frame labels, "
            "such as biased runs fed back)") in summary
    assert "objective 'both' ranks on the transition slowness" in summary
    ranking = json.loads((tmp_path / "out" / "ranking.json").read_text())
    assert ranking["ranking"][0]["slowness_ranked_on"] == "transitions"
    report = (tmp_path / "out" / "report.html").read_text()
    assert "along the runs that cross between the states" in report


def test_suggest_with_crossing_runs_gives_the_same_bytes_on_two_processes(short_leaves, toy):
    kwargs = dict(objective="both", lag=LAG_PS, n_bootstrap=20, max_terms=1, n_suggestions=2,
                  kinds=("distance",), cutoff=5.0, n_folds=3, seed=1)
    serial = suggest(_source(toy), **kwargs)
    parallel = suggest(_source(toy), executor=2, **kwargs)
    assert serial.ranking_json() == parallel.ranking_json()
    assert serial.ranking_csv() == parallel.ranking_csv()


def test_labels_file_with_another_number_of_frames_is_refused_naming_both_files(
        toy, tmp_path, capsys):
    from cvdesign.cli import main

    path, _, labels, _ = toy["crossing"][0]
    short = tmp_path / "short.labels"
    short.write_text("".join(Path(labels).read_text().splitlines(True)[:-3]))
    args = _cli_args(toy, tmp_path / "out", (1,)) + ["--labelled", path, str(short)]
    assert main(args) == 2
    assert re.search(r"--labelled .*biased-0\.xtc .*short\.labels: labels file "
                     r"'.*short\.labels' holds 1997 labels, but trajectory '.*biased-0\.xtc' "
                     r"has 2000 frames; give one line per frame", capsys.readouterr().err)
    assert not (tmp_path / "out").exists()


def test_a_run_whose_labels_only_flicker_is_no_crossing_run(tmp_path):
    """Visits shorter than the lag are not crossings: a run labelled 'a' but for one-frame
    flickers to 'b' gives no transition data (before, each flicker counted as a crossing and
    the run's pairs, within one state, passed for transition slowness); a run that does
    cross is kept beside it, the flickering one left out."""
    from cvdesign.passes import CoordinateFeaturizer
    from cvdesign.pipeline.transitions import gather_transitions

    top = md.Topology()
    top.add_atom("C", md.element.carbon, top.add_residue("X", top.add_chain()))
    x = np.full(400, 0.5)
    flicker = np.where(np.arange(400) % 50 == 7, "b", "a")
    crossing = np.repeat(np.tile(["a", "b"], 4), 50)

    def write(name, xs):
        path = tmp_path / name
        md.Trajectory(np.stack([xs, 0 * xs, 0 * xs], 1)[:, None].astype(np.float32),
                      top).save_xtc(str(path))
        return str(path)

    src = Source(top).add_labelled(write("flicker.xtc", x), flicker)
    assert gather_transitions(src, CoordinateFeaturizer([0]), np.zeros(3), {0: 5}, 2) is None
    hop = np.where(crossing == "a", 0.5, 1.5)
    src.add_labelled(write("hop.xtc", hop), crossing)
    data = gather_transitions(src, CoordinateFeaturizer([0]), np.zeros(3), {0: 5, 1: 5}, 2)
    assert [p.split("/")[-1] for p in data.paths] == ["hop.xtc"] and data.n_crossings == [7]
    assert "left out, labelled with two states but never crossing" in data.notes[0]
    assert "flicker.xtc" in data.notes[0]
