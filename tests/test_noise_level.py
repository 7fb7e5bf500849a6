"""The held-out Fisher ratio beside what noise alone gives (``heldout_fisher_ratio_noise``).

Two states drawn from one distribution still give a ranked CV with a held-out Fisher
ratio well above zero: each fold's held-out state means differ by noise, and the search
keeps the best of many held-out scores. The noise level of a fixed direction is
``sum_k p_k (1 - p_k) 2 tau / n_k`` for states of ``n_k`` held-out frames and an integrated
time of ``tau`` frames (the variance of a mean of correlated frames, Sokal 1997, in
*Functional Integration*, Plenum; the rest our algebra), and a ranked CV below ten times it
is warned about. Also here, on the same runs: when the common-mean timescale is a
process the runs resolve.
"""

import mdtraj as md
import numpy as np
import pytest
from scipy.signal import lfilter

from cvdesign import Source, suggest
from cvdesign.pipeline.ranking import NOISE_LEVEL_FACTOR


def _runs(directory, shift_nm, seed):
    """Twelve atoms jittering about fixed places (AR(1), 0.95 per 1 ps frame, 0.02 nm), two
    runs of 1500 frames per state; state B has atom C1 moved by `shift_nm` along x."""
    rng = np.random.default_rng(seed)
    top = md.Topology()
    res = top.add_residue("TOY", top.add_chain())
    for i in range(12):
        top.add_atom(f"C{i + 1}", md.element.carbon, res)
    base = rng.uniform(0.0, 1.2, size=(12, 3))
    files = {}
    for state in ("A", "B"):
        for r in range(2):
            noise = lfilter([1.0], [1.0, -0.95], rng.normal(size=(1500, 36)), axis=0)
            xyz = base + 0.02 * np.sqrt(1 - 0.95 ** 2) * noise.reshape(1500, 12, 3)
            if state == "B":
                xyz[:, 0, 0] += shift_nm
            path = directory / f"{state}{r}.xtc"
            md.Trajectory(xyz.astype(np.float32), top,
                          time=np.arange(1500) * 1.0).save_xtc(str(path))
            files.setdefault(state, []).append(str(path))
    pdb = directory / "top.pdb"
    md.Trajectory(base[None].astype(np.float32), top).save_pdb(str(pdb))
    return str(pdb), files


def _suggest(directory, shift_nm, seed=3):
    top, files = _runs(directory, shift_nm, seed)
    return suggest(Source.from_states(top, files), kinds=("distance",), max_terms=2,
                   n_suggestions=3, n_bootstrap=0)


def test_states_of_one_distribution_are_warned_about(tmp_path):
    res = _suggest(tmp_path, 0.0)
    first = res.ranking[0]
    level = first["heldout_fisher_ratio_noise"]
    # noise alone: the best held-out ratio is above zero, and within ten times the level
    assert 0 < level < first["heldout_fisher_ratio"] < NOISE_LEVEL_FACTOR * level
    assert any("less than 10 times what noise alone gives" in w for w in first["warnings"])
    note = next(n for n in res.notes if n.startswith("warning: the held-out Fisher ratio of "
                                                     "rank"))
    assert "the states may not differ along any CV found" in note
    # the level from the CV's integrated time (frames of 1 ps) and the folds' frames: two
    # folds of one run per state, so sum_k (1/4) 2 tau / 1500 over two states
    tau = first["integrated_time_ps"]
    assert level == pytest.approx(2 * 0.25 * 2 * tau / 1500, rel=1e-12)


def test_states_that_differ_are_not_warned_about(tmp_path):
    # C1 moved by 0.04 nm, twice the spread of its jitter: a held-out ratio near 0.5, about
    # 45 times the level (seed 3; 0.02 nm gave 12 times, a null run up to 10 times)
    res = _suggest(tmp_path, 0.04)
    first = res.ranking[0]
    assert first["heldout_fisher_ratio"] > NOISE_LEVEL_FACTOR * \
        first["heldout_fisher_ratio_noise"]
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
