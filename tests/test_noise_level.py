"""The held-out Fisher ratio beside what noise alone gives (``heldout_fisher_ratio_noise``).

Two states drawn from one distribution still give a ranked CV with a held-out Fisher
ratio well above zero: each fold's held-out state means differ by noise, and the search
keeps the best of many held-out scores. The noise level of a fixed direction is
``sum_k p_k (1 - p_k) 2 tau / n_k`` for states of ``n_k`` held-out frames and an integrated
time of ``tau`` frames (the variance of a mean of correlated frames, Sokal 1997, in
*Functional Integration*, Plenum; the rest our algebra; ``n_k`` every held-out fold's
frames, pooled as the held-out score pools them), and a ranked CV below twenty times it is
warned about. Also here, on the same runs: when the common-mean timescale is a
process the runs resolve.
"""

import mdtraj as md
import numpy as np
import pytest
from scipy.signal import lfilter

from cvdesign import Source, suggest
from cvdesign.pipeline.ranking import FOLD_SPREAD_FACTOR, NOISE_LEVEL_FACTOR


def _runs(directory, shift_nm, seed, n_runs=2, run_offset_nm=0.0):
    """Twelve atoms jittering about fixed places (AR(1), 0.95 per 1 ps frame, 0.02 nm),
    `n_runs` runs of 1500 frames per state, each run's atoms displaced by an offset of its
    own (normal, `run_offset_nm`: runs that are not equilibrated); state B has atom C1
    moved by `shift_nm` along x."""
    rng = np.random.default_rng(seed)
    top = md.Topology()
    res = top.add_residue("TOY", top.add_chain())
    for i in range(12):
        top.add_atom(f"C{i + 1}", md.element.carbon, res)
    base = rng.uniform(0.0, 1.2, size=(12, 3))
    files = {}
    for state in ("A", "B"):
        for r in range(n_runs):
            noise = lfilter([1.0], [1.0, -0.95], rng.normal(size=(1500, 36)), axis=0)
            xyz = base + 0.02 * np.sqrt(1 - 0.95 ** 2) * noise.reshape(1500, 12, 3)
            if run_offset_nm:
                xyz += rng.normal(0.0, run_offset_nm, size=(1, 12, 3))
            if state == "B":
                xyz[:, 0, 0] += shift_nm
            path = directory / f"{state}{r}.xtc"
            md.Trajectory(xyz.astype(np.float32), top,
                          time=np.arange(1500) * 1.0).save_xtc(str(path))
            files.setdefault(state, []).append(str(path))
    pdb = directory / "top.pdb"
    md.Trajectory(base[None].astype(np.float32), top).save_pdb(str(pdb))
    return str(pdb), files


def _suggest(directory, shift_nm, seed=3, **runs):
    top, files = _runs(directory, shift_nm, seed, **runs)
    return suggest(Source.from_states(top, files), kinds=("distance",), max_terms=2,
                   n_suggestions=3, n_bootstrap=0)


def test_states_of_one_distribution_are_warned_about(tmp_path):
    res = _suggest(tmp_path, 0.0)
    first = res.ranking[0]
    level = first["heldout_fisher_ratio_noise"]
    # noise alone: the best held-out ratio is above zero, and within ten times the level
    assert 0 < level < first["heldout_fisher_ratio"] < NOISE_LEVEL_FACTOR * level
    assert any("less than 20 times what noise alone gives" in w for w in first["warnings"])
    # noise lifts the held-out ratio above the one on all frames: not a run-offset warning
    assert not any("times its Fisher ratio on all frames" in w for e in res.ranking
                   for w in e["warnings"])
    note = next(n for n in res.notes if n.startswith("warning: the held-out Fisher ratio of "
                                                     "rank"))
    assert "the states may not differ along any CV found" in note
    # the level from the states' times (frames of 1 ps; at least the integrated time, more
    # when the two runs' means scatter more than it allows) and the states' frames: two runs
    # of 1500 frames per state, pooled, so at least sum_k (1/4) 2 tau_k / 3000 over the two
    # states
    tau = first["integrated_time_ps"]  # the slower state's
    assert level >= 0.25 * 2 * tau / 3000


def test_runs_each_at_an_offset_of_their_own_are_warned_about(tmp_path):
    # one law in both states, but every run displaced by its own offset (sd 0.02 nm): the
    # states' means vary with their runs far more than the frames' correlation says, and
    # the held-out ratio of rank 1 was 44 times a level from the integrated times alone
    res = _suggest(tmp_path, 0.0, seed=3, n_runs=3, run_offset_nm=0.02)
    first = res.ranking[0]
    assert any("less than 20 times what noise alone gives" in w for w in first["warnings"])
    # three folds of one run per state: the states' own times alone give at most
    # 2 (1/4) 2 tau / 1500 with tau the slower state's; the runs' scatter lifts it above
    assert first["heldout_fisher_ratio_noise"] > first["integrated_time_ps"] / 1500


def test_reweighted_runs_get_the_noise_level_and_the_runs_too_short_check(tmp_path):
    """The same null runs, each at an offset of its own, given as biased runs: bias
    energies of a fraction of kT (Kish fraction about 0.9) leave the screen as it was
    (they had turned the noise level and the runs-too-short check off for every state)."""
    top, files = _runs(tmp_path, 0.0, 3, n_runs=3, run_offset_nm=0.02)
    rng = np.random.default_rng(8)
    bias = {}
    for f in (f for fs in files.values() for f in fs):
        bias[f] = str(tmp_path / (f.rsplit("/", 1)[-1] + ".bias"))
        values = rng.uniform(0.0, 1.5, 1500)  # kJ/mol, about 0.6 kT at 300 K
        with open(bias[f], "w") as fh:
            fh.write("".join(f"{float(v)!r}\n" for v in values))
    kw = dict(kinds=("distance",), max_terms=2, n_suggestions=3, n_bootstrap=0)
    plain = suggest(Source.from_states(top, files), **kw)
    biased = suggest(Source.from_states(top, files, bias=bias, temperature=300.0), **kw)
    # one CV in both rankings (their orders may differ: the weights move the scores)
    a = plain.ranking[0]
    b = next(e for e in biased.ranking if [t["descriptor"] for t in e["terms"]] ==
             [t["descriptor"] for t in a["terms"]])
    assert b["heldout_fisher_ratio_noise"] is not None
    # fewer effective frames than frames: a higher level, of the same order
    assert a["heldout_fisher_ratio_noise"] < b["heldout_fisher_ratio_noise"] < \
        3 * a["heldout_fisher_ratio_noise"]
    assert any("less than 20 times what noise alone gives" in w and
               "effective ones where reweighted" in w for w in b["warnings"])
    assert any(n.startswith("integrated times: for") and "too short" in n
               for n in biased.notes)
    assert not b["integrated_time_decayed"]


def test_files_that_store_no_times_still_get_the_noise_level_in_frames(tmp_path):
    """The same null runs as DCD files, which store no times: no integrated time in ps, but
    the noise level needs the CV's own times in frames only, the same as with times; it had
    been left empty, and the warning off, without a word."""
    top, files = _runs(tmp_path, 0.0, 3)
    dcd = {s: [] for s in files}
    for s, fs in files.items():
        for f in fs:
            path = f[:-4] + ".dcd"
            md.load(f, top=top).save_dcd(path)
            dcd[s].append(path)
    kw = dict(kinds=("distance",), max_terms=2, n_suggestions=3, n_bootstrap=0)
    timed = suggest(Source.from_states(top, files), **kw).ranking[0]
    untimed = suggest(Source.from_states(top, dcd), **kw).ranking[0]
    assert untimed["integrated_time_ps"] is None
    # the same frames (the XTC's coordinates written again): the same level
    assert [t["descriptor"] for t in untimed["terms"]] == [t["descriptor"] for t in
                                                           timed["terms"]]
    assert untimed["heldout_fisher_ratio_noise"] == pytest.approx(
        timed["heldout_fisher_ratio_noise"], rel=1e-6)  # (times in ps, then frames)
    assert any("less than 20 times what noise alone gives" in w for w in untimed["warnings"])


def test_runs_at_offsets_of_their_own_are_counted_and_warned_about(tmp_path):
    """States that differ (C1 moved by 0.3 nm), but every run displaced by an offset of its
    own (sd 0.05 nm): each held-out fold holds one run per state, whose spread is far below
    the state's over all its runs. Scored fold by fold, the held-out ratio of rank 1 came
    out 2.6 times the one on all frames (seed 3), without a word. Pooled, the held-out
    score counts the offsets (for a CV of one term, the pooled ratio is the one on all
    frames exactly), and the folds' own ratios, far above it, are warned about."""
    top, files = _runs(tmp_path, 0.3, 3, n_runs=3, run_offset_nm=0.05)
    res = suggest(Source.from_states(top, files), kinds=("distance",), max_terms=2,
                  n_suggestions=3, n_bootstrap=0)
    first = res.ranking[0]
    assert first["heldout_fisher_ratio"] > NOISE_LEVEL_FACTOR * first["heldout_fisher_ratio_noise"]
    for e in res.ranking:  # pooled: never far above the ratio on all frames
        assert e["heldout_fisher_ratio"] < 1.3 * e["fisher_ratio_all"]
        if e["n_terms"] == 1:
            assert e["heldout_fisher_ratio"] == pytest.approx(e["fisher_ratio_all"], rel=1e-9)
    assert np.mean(first["heldout_fisher_ratio_folds"]) > 2 * first["fisher_ratio_all"]
    assert any(w.startswith("within each held-out fold its Fisher ratio averages") and
               "times its Fisher ratio on all frames" in w for w in first["warnings"])
    assert any(n.startswith("warning: within each held-out fold the Fisher ratio of rank 1")
               and "the ranking counts that spread" in n for n in res.notes)
    for e in res.ranking:  # never beside the noise warning, always the folds far above
        warned = any(w.startswith("within each held-out fold") for w in e["warnings"])
        if warned:
            assert not any("what noise alone gives" in w for w in e["warnings"])
            assert np.mean(e["heldout_fisher_ratio_folds"]) > \
                FOLD_SPREAD_FACTOR * e["fisher_ratio_all"]


def test_states_that_differ_are_not_warned_about(tmp_path):
    # C1 moved by 0.04 nm, twice the spread of its jitter: a held-out ratio near 0.5, about
    # 100 times the level (seeds 0-7: 65 to 115; 0.02 nm gave 15 to 42 times, null runs 3
    # to 34 times)
    res = _suggest(tmp_path, 0.04)
    first = res.ranking[0]
    assert first["heldout_fisher_ratio"] > NOISE_LEVEL_FACTOR * \
        first["heldout_fisher_ratio_noise"]
    # runs that agree: the held-out ratio near the one on all frames, no warning
    assert first["heldout_fisher_ratio"] < 1.2 * first["fisher_ratio_all"]
    assert not any("times its Fisher ratio on all frames" in w for w in first["warnings"])
    assert np.mean(first["heldout_fisher_ratio_folds"]) < 1.2 * first["fisher_ratio_all"]
    assert not any("noise alone" in w for w in first["warnings"])
    assert not any("noise alone" in n for n in res.notes)


def test_weight_intervals_stay_within_the_unit_length_of_the_direction(tmp_path):
    # a null run's weights scatter widely between replicates; the hull of the percentile
    # and basic intervals reached past 1 (e.g. [-0.573, 1.837]) for a unit-length direction
    top, files = _runs(tmp_path, 0.0, 3)
    res = suggest(Source.from_states(top, files), kinds=("distance",), max_terms=3,
                  n_suggestions=3, n_bootstrap=40, seed=1)
    cis = [t["weight_ci"] for r in res.ranking for t in r["terms"]]
    assert cis and all(-1.0 <= lo <= hi <= 1.0 for lo, hi in cis)
    assert any(hi - lo > 0.5 for lo, hi in cis)  # wide: the bound is what holds them
    for r in res.ranking:
        assert np.linalg.norm([t["weight"] for t in r["terms"]]) == pytest.approx(1.0)


def test_a_common_mean_timescale_held_up_by_the_offsets_between_states_is_not_resolved(
        tmp_path):
    # states 0.1 nm apart that never interconvert, fast inside: the common-mean
    # autocorrelation stays near B / (B + W) and its timescale (below the runs' length) grew
    # with the lag, yet was flagged resolved
    (tmp_path / "apart").mkdir()
    (tmp_path / "same").mkdir()
    apart = _suggest(tmp_path / "apart", 0.1).ranking[0]
    assert apart["timescale_ps"] < apart["longest_visit_ps"]
    assert apart["timescale_resolved"] is False
    # states that do not differ: the autocorrelation is the relaxation inside them
    same = _suggest(tmp_path / "same", 0.0).ranking[0]
    assert same["timescale_ps"] < same["longest_visit_ps"]
    assert same["timescale_resolved"] is True
