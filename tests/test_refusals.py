"""Answers right or refused: frozen input, a lag longer than every run, and bootstrap
selection frequencies that describe the CV they stand beside."""

import csv
import io
import json

import mdtraj as md
import numpy as np
import pytest

from cvdesign import InputError, Source, suggest
from cvdesign.constants import BOLTZMANN_KJ_MOL_K
from cvdesign.stats.bootstrap import MIN_INTERVAL_BLOCKS


def _repeated_frames(path_in, top, path_out, n=60, frame=0):
    traj = md.load(path_in, top=top)[frame]
    md.Trajectory(np.repeat(traj.xyz, n, axis=0), traj.topology,
                  time=np.arange(n, dtype=np.float64)).save_xtc(str(path_out))
    return str(path_out)


def test_frozen_states_are_refused_not_scored_1e12(demo_files, tmp_path):
    # every frame of each state is the same structure: no within-state spread anywhere
    top, states = demo_files
    src = Source(top)
    for name, files in states.items():
        src.add(_repeated_frames(files[0], top, tmp_path / f"{name}.xtc", n=60), name)
    with pytest.raises(InputError, match=r"frozen within some state .* real dynamics"):
        suggest(src, n_bootstrap=0)


def test_a_descriptor_frozen_in_one_state_is_named_and_not_combined(demo_files, tmp_path):
    # real runs of both states, but in every open frame the atom F3 is put at a fixed
    # offset from C1: the pair C1-F3 is frozen in 'open' (its Fisher ratio would be
    # infinite), everything else moves.
    top, states = demo_files
    src = Source(top)
    for f in states["closed"][:2]:
        src.add(f, "closed")
    for k, f in enumerate(states["open"][:2]):
        traj = md.load(f, top=top)
        xyz = traj.xyz.copy()
        xyz[:, 11] = xyz[:, 0] + np.array([0.5, 0.0, 0.0], dtype=np.float32)
        out = tmp_path / f"open-{k}.xtc"
        md.Trajectory(xyz, traj.topology, time=traj.time).save_xtc(str(out))
        src.add(str(out), "open")
    result = suggest(src, n_bootstrap=0, max_terms=2, n_suggestions=3)
    rows = {r["id"]: r for r in result.scorecard}
    frozen = rows["distance:0-11"]
    assert frozen["fisher_ratio"] is None
    assert frozen["note"].startswith("frozen: does not move within state(s) open")
    assert not frozen["screened"]
    assert any(n.startswith("frozen: 1 descriptor(s)") for n in result.notes)
    assert all(t["descriptor"] != "distance:0-11" for r in result.ranking for t in r["terms"])
    assert "1e+12" not in result.scorecard_csv()


def test_lag_longer_than_every_run_leaves_slowness_unmeasured(demo_files, tmp_path):
    top, states = demo_files
    src = Source.from_states(top, {s: f[:2] for s, f in states.items()})
    result = suggest(src, lag=100_000.0, n_bootstrap=0, max_terms=2, n_suggestions=2)
    assert any(n.startswith("slowness not measured: no run is longer than the lag")
               for n in result.notes)
    for r in result.ranking:
        assert r["heldout_autocorrelation"] is None
        assert r["autocorrelation_all"] is None and r["timescale_ps"] is None
    for row in result.scorecard:
        assert row["autocorrelation"] is None and row["autocorrelation_within_runs"] is None
    table = list(csv.DictReader(io.StringIO(result.ranking_csv())))
    assert all(row["heldout_autocorrelation"] == "" and row["timescale_ps"] == ""
               for row in table)
    card = list(csv.DictReader(io.StringIO(result.scorecard_csv())))
    assert all(row["autocorrelation"] == "" for row in card)
    doc = json.loads(result.ranking_json())
    assert doc["lag_ps"] is None
    assert "slowness not measured" in result.summary_md()


@pytest.mark.parametrize("objective", ["slow", "both"])
def test_lag_longer_than_every_run_is_refused_when_slowness_is_the_objective(demo_files,
                                                                             objective):
    top, states = demo_files
    src = Source.from_states(top, {s: f[:2] for s, f in states.items()})
    with pytest.raises(InputError, match=r"lag=100000 ps is longer than every run "
                                         r"\(the longest run is \d+ frames"):
        suggest(src, objective=objective, lag=100_000.0, n_bootstrap=0)


@pytest.mark.parametrize("objective", ["separate", "both"])
def test_selection_frequencies_describe_the_cv_they_stand_beside(demo_files, objective):
    # The demo's two best CVs (the slow dihedral, then the distance C3-C6, far ahead of
    # the rest) are stable; every one of their terms must be reported as kept by most
    # refits of the search -- not 0 % for a term of the rank-1 CV under one objective and
    # 100 % under the other, and not 0 % for every CV below rank 1. (Rank 3 and below
    # swap places between refits, and their frequencies say so.)
    top, states = demo_files
    result = suggest(Source.from_states(top, states), objective=objective, lag=2.0,
                     n_bootstrap=20, max_terms=2, n_suggestions=2)
    table = list(csv.DictReader(io.StringIO(result.ranking_csv())))
    for r, row in zip(result.ranking, table):
        assert r["reproduced_in_refits"] is not None
        assert float(row["reproduced_in_refits"]) == pytest.approx(r["reproduced_in_refits"],
                                                                  rel=1e-5)
        for t in r["terms"]:
            assert t["selection_frequency"] >= 0.8, (r["rank"], t["label"])


def test_no_selection_frequencies_when_every_refit_would_see_the_same_data(
        adk_result_for_redundancy):
    # Adenylate kinase (MDAnalysis test data): 30 frames of one file per state, too short
    # for the domain motion to decorrelate, so the bootstrap blocks are whole runs and each
    # held-out fold holds a single block of each state. Resampling blocks within a state and
    # fold then gives every refit the same data: selection 100 %, reproduced 1.0 and
    # held-out intervals of zero width were reported as if measured. With fewer than
    # MIN_INTERVAL_BLOCKS blocks in a state (here one per fold), no interval is given at
    # all: intervals from so few blocks cover the truth far less often than they say.
    res = adk_result_for_redundancy
    assert any("blocks of whole runs" in n for n in res.notes)
    (note,) = [n for n in res.notes if n.startswith("uncertainties: none")]
    assert f"a state has fewer than {MIN_INTERVAL_BLOCKS}, and intervals from so few" in note
    for r in res.ranking:
        assert r.get("reproduced_in_refits") is None
        assert "heldout_score_ci" not in r and "heldout_fisher_ratio_ci" not in r
        assert all("selection_frequency" not in t for t in r["terms"])
        assert r.get("fisher_ratio_ci") is None
    for row in csv.DictReader(io.StringIO(res.ranking_csv())):
        assert row["selection_frequency"] == "" and row["reproduced_in_refits"] == ""
        assert row["heldout_score_ci_low"] == "" and row["heldout_score_ci_high"] == ""


@pytest.fixture(scope="module")
def short_closed(demo_files, tmp_path_factory):
    """Two closed runs of 20 frames (4 ps) and two full open runs (400 ps) of the demo."""
    top, states = demo_files
    d = tmp_path_factory.mktemp("short_closed")
    closed = []
    for k, f in enumerate(states["closed"][:2]):
        path = d / f"closed-{k}.xtc"
        md.load(f, top=top)[:20].save_xtc(str(path))
        closed.append(str(path))
    return Source.from_states(top, {"closed": closed, "open": states["open"][:2]})


def test_lag_longer_than_every_run_of_one_state_leaves_slowness_unmeasured(short_closed):
    # Only the open runs have lagged pairs at 10 ps: measured on them alone, the slow
    # dihedral that separates the states relaxes within the open well (autocorrelation
    # about 0.01) and was reported as fast; with --objective both it was dropped.
    result = suggest(short_closed, lag=10.0, n_bootstrap=0, max_terms=1, n_suggestions=2)
    assert result.ranking[0]["terms"][0]["descriptor"] == "dihedral:2-3-4-5"
    (note,) = [n for n in result.notes if n.startswith("slowness not measured")]
    assert "no run of state(s) 'closed' is longer than the lag (10 ps; the longest run is " \
           "20 frames (3.8 ps from its first frame to its last))" in note
    for r in result.ranking:
        assert r["heldout_autocorrelation"] is None and r["timescale_ps"] is None
    assert all(row["autocorrelation"] is None for row in result.scorecard)
    assert all(row["heldout_autocorrelation"] == ""
               for row in csv.DictReader(io.StringIO(result.ranking_csv())))


@pytest.mark.parametrize("objective", ["slow", "both"])
def test_lag_longer_than_every_run_of_one_state_is_refused_for_slowness_objectives(
        short_closed, objective):
    with pytest.raises(InputError, match=r"lag=10 ps is longer than every run of state\(s\) "
                                         r"'closed' \(the longest run is 20 frames \(3\.8 ps "
                                         r"from its first frame to its last\)\)"
                                         r": slowness would be measured on the other states' "
                                         r"runs alone"):
        suggest(short_closed, objective=objective, lag=10.0, n_bootstrap=0)


def test_lag_refusal_names_the_longest_visit_of_a_labelled_biased_run_in_rescaled_time(
        demo_files, tmp_path):
    # A biased run labelled frame by frame visits 'closed' twice, for 5 and 7 frames
    # (0.2 ps apart), under a constant bias of kT ln 2 (each frame 2 frame spacings of
    # rescaled time). Lagged pairs never span a visit and are taken in rescaled time, so
    # the longest run that a lag of 10 ps must fit in is the 7-frame visit: 12 frame
    # spacings, 2.4 ps from its first frame to its last. The message said "the longest run
    # is 12 frames (2.4 ps)" before (every 'closed' frame of the file, in the run's own
    # time); for a while it gave 14 frame spacings (2.8 ps), counting the step after the
    # visit's last frame, so that a refused lag of 2.6 ps looked shorter than the run.
    top, states = demo_files
    path = tmp_path / "closed-biased.xtc"
    md.load(states["closed"][0], top=top)[:20].save_xtc(str(path))
    labels = ["closed"] * 5 + [None] * 3 + ["closed"] * 7 + [None] * 5
    kt = BOLTZMANN_KJ_MOL_K * 300.0
    bias = tmp_path / "closed-biased.bias"
    bias.write_text("bias\n" + f"{float(kt * np.log(2.0))!r}\n" * 20, encoding="utf-8")
    src = Source(top, temperature=300.0).add_labelled(str(path), labels, bias=str(bias))
    for f in states["open"][:2]:
        src.add(f, "open")
    before = sorted(tmp_path.iterdir())
    with pytest.raises(InputError, match=r"lag=10 ps is longer than every run of state\(s\) "
                                         r"'closed' \(the longest run is a visit of 7 frames in "
                                         r"the labelled file closed-biased\.xtc, 12 frame "
                                         r"spacings \(2\.4 ps\) of rescaled time from its "
                                         r"first frame to its last\)"):
        suggest(src, objective="both", lag=10.0, n_bootstrap=0)
    assert sorted(tmp_path.iterdir()) == before


def _chain_at_dihedrals(phi):
    """Four bonded atoms (bonds 0.15 nm, angles 109.5 deg) at the dihedral angles `phi`
    (rad), the fourth atom placed from the first three (natural extension reference frame;
    Parsons et al., J. Comput. Chem. 26:1063, 2005)."""
    n = phi.size
    b, theta = 0.15, np.deg2rad(109.5)
    a0 = np.array([0.0, 0.0, 0.0])
    a1 = np.array([b, 0.0, 0.0])
    a2 = a1 + b * np.array([-np.cos(theta), np.sin(theta), 0.0])
    bc = (a2 - a1) / np.linalg.norm(a2 - a1)
    nrm = np.cross(a1 - a0, bc)
    nrm /= np.linalg.norm(nrm)
    frame = np.stack([bc, np.cross(nrm, bc), nrm])
    local = b * np.stack([-np.cos(theta) * np.ones(n), np.sin(theta) * np.cos(phi),
                          np.sin(theta) * np.sin(phi)], axis=1)
    xyz = np.zeros((n, 4, 3))
    xyz[:, 0], xyz[:, 1], xyz[:, 2] = a0, a1, a2
    xyz[:, 3] = a2 + local @ frame
    return xyz.astype(np.float32)


def test_a_dihedral_whose_cosine_barely_moves_is_still_scored(tmp_path):
    # state A sits at phi = 0 with 5e-4 rad spread: its cosine changes by ~1e-7 (frozen
    # at float precision) while its sine moves; the dihedral is not frozen
    top = md.Topology()
    res = top.add_residue("RIG", top.add_chain(), resSeq=1)
    atoms = [top.add_atom(f"C{i}", md.element.carbon, res) for i in range(4)]
    for a, b in zip(atoms, atoms[1:]):
        top.add_bond(a, b)
    rng = np.random.default_rng(3)
    src = Source(top)
    for name, mean, sd in (("A", 0.0, 5e-4), ("B", 2.0, 0.2)):
        for k in range(2):
            traj = md.Trajectory(_chain_at_dihedrals(rng.normal(mean, sd, 400)), top)
            phi = md.compute_dihedrals(traj, [[0, 1, 2, 3]])[:, 0]
            assert abs(np.mean(phi) - mean) < 0.05  # the geometry is what the test says
            path = tmp_path / f"{name}{k}.dcd"
            traj.save_dcd(str(path))
            src.add(str(path), name)
    result = suggest(src, kinds=("dihedral",), n_bootstrap=0, max_terms=1, n_suggestions=1)
    (row,) = result.scorecard
    assert row["fisher_ratio"] is not None and row["fisher_ratio"] > 1
    assert not row["note"].startswith("frozen")
    assert result.ranking[0]["terms"][0]["descriptor"] == row["id"]


def test_a_state_of_one_frame_is_refused_as_too_few_frames_not_as_frozen(demo_files, tmp_path):
    # A single frame cannot move, so the screening refused it as 'frozen ... not one
    # repeated frame'; the fold plan, now before the screening, names the cause.
    top, states = demo_files
    one = tmp_path / "one.xtc"
    md.load(states["closed"][0], top=top)[:1].save_xtc(str(one))
    source = Source.from_states(top, {"closed": [str(one)], "open": states["open"][:1]})
    with pytest.raises(InputError, match=r"state 'closed' has only 1 frame; held-out scoring "
                                         r"needs at least 20 per state"):
        suggest(source, n_bootstrap=0)


def test_a_held_out_fold_with_a_single_block_skips_the_refits_but_keeps_the_intervals(
        demo_files, tmp_path):
    # Each state has plenty of blocks (intervals of the full-data fits are given), but one
    # held-out fold of 'closed' holds a single short run, one block: refits of the search on
    # folds resampled within each fold would all see the same data there, so the selection
    # frequencies and held-out intervals are left out and the summary says why.
    top, states = demo_files
    short = tmp_path / "short.xtc"
    md.load(states["closed"][2], top=top)[:12].save_xtc(str(short))
    source = Source.from_states(top, {"closed": states["closed"][:2] + [str(short)],
                                      "open": states["open"]})
    res = suggest(source, n_bootstrap=40, max_terms=1, n_suggestions=2)
    (note,) = [n for n in res.notes if n.startswith("no selection frequencies")]
    assert "a single bootstrap block in a held-out fold" in note
    for r in res.ranking:
        assert r.get("reproduced_in_refits") is None and "heldout_score_ci" not in r
        lo, hi = r["fisher_ratio_ci"]  # the per-state bootstrap still runs
        assert lo <= r["fisher_ratio_all"] <= hi


@pytest.mark.parametrize("asked", [2, 1000])
def test_fewer_folds_than_asked_for_are_said_in_the_notes(demo_files, asked):
    # --folds 1000 became 2 folds without a word
    top, states = demo_files
    src = Source(top)
    for name in ("closed", "open"):
        for f in states[name][:2]:
            src.add(f, name, frames=(0, 200))
    res = suggest(src, n_folds=asked, n_bootstrap=0, max_terms=1, n_suggestions=1)
    note = next(n for n in res.notes if n.startswith("held-out scoring: "))
    assert note.startswith("held-out scoring: 2-fold cross-validation by whole trajectories")
    said = ("; 2 are used, not 1000 (the number given; --folds, n_folds=): a state has no "
            "more trajectories than that")
    assert note.endswith(said) == (asked == 1000)


def test_fewer_folds_than_the_default_are_not_said_to_be_asked_for(demo_files):
    # the note said "4 folds were asked for" when the user had given none
    top, states = demo_files
    src = Source(top)
    for name in ("closed", "open"):
        for f in states[name][:2]:
            src.add(f, name, frames=(0, 200))
    res = suggest(src, n_bootstrap=0, max_terms=1, n_suggestions=1)
    note = next(n for n in res.notes if n.startswith("held-out scoring: "))
    assert note.endswith("; 2 are used, not 4 (the default; --folds, n_folds=): a state has "
                         "no more trajectories than that")
