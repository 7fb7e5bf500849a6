"""Issue 3 behaviour of the pipeline: objectives, lag handling, unlabelled runs, slowness."""

import warnings

import numpy as np
import pytest

from cvdesign import InputError, Source, suggest
from cvdesign.pipeline.explore import propose_states
from cvdesign.search import FoldMoments, autocorrelation_along, heldout_score, slow_direction
from cvdesign.stats.moments import DiagonalLaggedMoments, LaggedMoments
from cvdesign.pipeline.timing import integrated_time
from cvdesign.testbed import write_two_wells


@pytest.fixture(scope="module")
def two_wells_data(tmp_path_factory):
    """Testbed runs: a slow double-well torsion (never crosses) and a fast one (hops)."""
    return write_two_wells(tmp_path_factory.mktemp("two_wells"))


def _dihedral_id(atoms):
    return "dihedral:" + "-".join(map(str, atoms))


def _rank1_descriptors(result):
    return {t["descriptor"] for t in result.ranking[0]["terms"]}


def test_slow_objective_picks_the_slow_torsion_and_separate_with_fast_labels_the_fast_one(
        two_wells_data):
    data = two_wells_data
    slow_id, fast_id = _dihedral_id(data.slow_dihedral), _dihedral_id(data.fast_dihedral)
    # Labels by the fast well: the separating CV must follow the fast torsion.
    labelled = Source(data.topology)
    for path in data.paths:
        labelled.add_labelled(path, data.fast_labels[path])
    sep = suggest(labelled, objective="separate", n_bootstrap=0, max_terms=2)
    assert fast_id in _rank1_descriptors(sep)
    assert slow_id not in _rank1_descriptors(sep)
    # The slow objective on the runs of each slow well: the slow torsion wins.
    runs = Source.from_states(data.topology, data.files)
    slow = suggest(runs, objective="slow", lag=10 * data.frame_step_ps, n_bootstrap=0,
                   max_terms=2)
    assert slow_id in _rank1_descriptors(slow)
    assert fast_id not in _rank1_descriptors(slow)
    # Both numbers are reported for every suggestion.
    for r in slow.ranking + sep.ranking:
        assert r["heldout_fisher_ratio"] is not None and r["heldout_overlap"] is not None
        assert r["heldout_autocorrelation"] is not None and r["timescale_ps"] is not None
    fast_row = next(r for r in slow.scorecard if r["id"] == fast_id)
    slow_row = next(r for r in slow.scorecard if r["id"] == slow_id)
    assert slow_row["autocorrelation"] > 0.9 > fast_row["autocorrelation"]


def test_both_objective_reports_and_combines_both_scores(two_wells_data):
    data = two_wells_data
    runs = Source.from_states(data.topology, data.files)
    res = suggest(runs, objective="both", lag=10 * data.frame_step_ps, n_bootstrap=0,
                  max_terms=2, n_suggestions=3)
    for r in res.ranking:
        j = r["heldout_fisher_ratio"]
        assert 0.0 <= r["heldout_score"] <= 1.0
        assert r["objective"] == "both" and r["method"] == "hlda"
        assert j >= 0 and r["heldout_autocorrelation"] <= 1.0
    assert _dihedral_id(data.slow_dihedral) in _rank1_descriptors(res)


def test_runs_without_a_slow_process_at_the_lag_are_told_so(demo_files):
    # One run inside one basin: every motion relaxes within a few ps.
    top, states = demo_files
    src = Source(top).add(states["closed"][0], "runs")
    with pytest.raises(InputError, match="the runs show no slow process at lag 40 ps: every "
                                         "implied timescale"):
        propose_states(src, lag=40.0)


def test_lag_that_is_not_a_whole_number_of_frames_is_refused(demo_files):
    top, states = demo_files
    src = Source.from_states(top, {k: v[:1] for k, v in states.items()})
    with pytest.raises(InputError, match=r"lag=0.3 ps is not a whole number of frames of "
                                         r"'.*closed-1.xtc' \(time step 0.2 ps\)"):
        suggest(src, objective="slow", lag=0.3)
    with pytest.raises(InputError, match="objective 'slow' needs a lag time"):
        suggest(src, objective="slow")


def test_lag_in_ps_needs_a_time_step_for_formats_without_times(mda_data, capfd):
    # DCD stores no times (adenylate kinase, MDAnalysis test data).
    def source(**kw):
        src = Source(str(mda_data / "adk.psf"), **kw)
        src.add(str(mda_data / "adk_dims.dcd"), "closed", frames=(0, 30))
        src.add(str(mda_data / "adk_dims.dcd"), "open", frames=(68, 98))
        return src

    capfd.readouterr()
    # the message serves the command and the Python API alike
    with pytest.raises(InputError, match=r"time step is unknown .* give the time step in ps "
                                         r"with --frame-step-ps PS \(Source\(\.\.\., "
                                         r"timestep=PS\) in the Python API\)"):
        suggest(source(), selection="name CA", objective="both", lag=2.0)
    res = suggest(source(timestep=1.0), selection="name CA", objective="both", lag=2.0,
                  n_bootstrap=0, max_terms=1, n_suggestions=1)
    assert res.lag_ps == 2.0 and res.ranking[0]["heldout_autocorrelation"] is not None
    # from Python the library prints nothing on standard output, not even the DCD reader's
    # own lines from C (they go to standard error), and nothing at all when discarded
    captured = capfd.readouterr()
    assert "dcdplugin" not in captured.out
    from cvdesign.io.source import reader_output_discarded

    with reader_output_discarded():
        suggest(source(timestep=1.0), selection="name CA", objective="both", lag=2.0,
                n_bootstrap=0, max_terms=1, n_suggestions=1)
    captured = capfd.readouterr()
    assert "dcdplugin" not in captured.out + captured.err


def test_integrated_time_of_an_ar1_process_matches_its_closed_form():
    # AR(1) x_t = phi x_{t-1} + noise has rho(k) = phi^k and integrated time
    # 1/2 + sum_k phi^k = (1 + phi) / (2 (1 - phi)) frames (Sokal 1997; from memory).
    rng = np.random.default_rng(0)
    phi = 0.9
    n = 200_000
    e = rng.normal(size=n)
    x = np.empty(n)
    x[0] = e[0] / np.sqrt(1 - phi**2)
    for t in range(1, n):
        x[t] = phi * x[t - 1] + e[t]
    lags = np.unique(np.round(np.geomspace(1, 400, 30)).astype(int))
    rho = np.array([DiagonalLaggedMoments.from_series(x[:, None], int(k)).autocorrelation()
                    for k in lags])
    tau, decayed = integrated_time(lags, rho, 0.5)
    exact = 0.5 * (1 + phi) / (2 * (1 - phi))
    assert decayed[0]
    assert tau[0] == pytest.approx(exact, rel=0.05)


def test_integrated_time_is_at_least_half_a_frame_never_negative():
    """Frames anti-correlated at the first lags (or noise) make Sokal's running sum fall to
    zero or below, where the window condition M >= 5 tau(M) holds at once: the estimate is
    floored at half a frame, the value for uncorrelated frames (an integrated time is never
    negative; a negative one was written out and refused by the hints). The floor leaves
    the AR(1) above untouched. Case from a review: rho = -0.5, -0.6, 0.1 at lags 1, 2, 3."""
    tau, decayed = integrated_time([1, 2, 3], [[-0.5], [-0.6], [0.1]], 0.06)
    assert tau[0] == pytest.approx(0.03, rel=1e-12) and decayed[0]
    # white noise (rho 0 at every lag): exactly half a frame, as before the floor
    tau, decayed = integrated_time([1, 2, 4], np.zeros((3, 1)), 0.2)
    assert tau[0] == pytest.approx(0.1, rel=1e-12) and decayed[0]
    # alternating frames (rho(k) = (-0.9)^k) sum to about 0.03 frames: floored too
    lags = np.arange(1, 40)
    tau, _ = integrated_time(lags, ((-0.9) ** lags)[:, None], 1.0)
    assert tau[0] == 0.5


def test_lags_without_pairs_end_the_sum_and_leave_a_lower_bound_not_a_decayed_time():
    """Visits of 40 frames (a labelled run) leave no pairs at longer lags (rho NaN). Counted
    as decorrelated (0), they met the window condition and an AR(1) of time 99.5 frames
    came out 'decayed' at about 31 frames with an interval excluding the truth (review).
    Now the sum stops before the first lag without pairs: a lower bound, not decayed."""
    lags = np.unique(np.round(np.geomspace(1, 2000, 18)).astype(int))
    rho = np.where(lags <= 40, 0.99 ** lags, np.nan)[:, None]
    tau, decayed, window = integrated_time(lags, rho, 1.0, return_window=True)
    kept = lags[lags <= 40]
    assert not decayed[0] and window[0] == kept[-1]
    # the trapezoid of rho (1 at lag 0) up to the last lag with pairs
    grid = np.concatenate([[0], kept])
    r = np.concatenate([[1.0], 0.99 ** kept])
    assert tau[0] == pytest.approx(float(np.sum(0.5 * (r[1:] + r[:-1]) * np.diff(grid))),
                                   rel=1e-12)
    # no pairs even at the first lag: no time at all
    tau, decayed = integrated_time(lags, np.full((lags.size, 1), np.nan), 1.0)
    assert np.isnan(tau[0]) and not decayed[0]


def test_scorecard_reports_slowness_of_every_descriptor(demo_result):
    for row in demo_result.scorecard:
        assert row["autocorrelation"] is not None
        assert -1.0 <= row["autocorrelation"] <= 1.0
    screened = [r for r in demo_result.scorecard if r["screened"]]
    assert all(r["integrated_time"] is not None for r in screened)
    assert "autocorrelation" in demo_result.scorecard_csv().splitlines()[0]


def test_slow_cv_is_in_kinetic_map_units(two_wells_data):
    # Kinetic map (Noe and Clementi, J. Chem. Theory Comput. 2015): the slow CV's variance
    # over the data equals its squared autocorrelation at the lag.
    import mdtraj as md

    from cvdesign.spec import Spec

    data = two_wells_data
    res = suggest(Source.from_states(data.topology, data.files), objective="slow",
                  lag=10 * data.frame_step_ps, n_bootstrap=0, max_terms=2, n_suggestions=1)
    spec = Spec.from_dict(res.specs[0])
    values = np.concatenate([spec.evaluate(md.load(p, top=data.topology).xyz)
                             for p in data.paths])
    rho = res.ranking[0]["autocorrelation_all"]
    assert values.var() == pytest.approx(rho**2, rel=0.02)


def test_lagged_pairs_never_span_a_change_of_label(demo_files):
    # One trajectory labelled in alternating blocks of 37 frames (with some unlabelled
    # frames): the score card's autocorrelation must equal a numpy computation that pairs
    # frames only within a block (reversible estimate about the pooled mean).
    import mdtraj as md

    top, states = demo_files
    path = states["closed"][0]
    labels = np.array([["a", "b"][(i // 37) % 2] for i in range(2000)], dtype=object)
    labels[500:520] = None
    src = Source.from_labels(top, path, labels)
    res = suggest(src, lag=10 * 0.2, n_bootstrap=0, max_terms=1, n_suggestions=1,
                  kinds=("distance",))
    row = next(r for r in res.scorecard if r["id"] == "distance:0-7")
    d = md.compute_distances(md.load(path, top=top), [[0, 7]])[:, 0].astype(np.float64)
    x0, xt = [], []
    for i in range(2000 - 10):
        j = i + 10
        if labels[i] is not None and labels[i] == labels[j] and \
                all(labels[k] == labels[i] for k in range(i, j + 1)):
            x0.append(d[i])
            xt.append(d[j])
    x0, xt = np.array(x0), np.array(xt)
    mean = 0.5 * (x0.mean() + xt.mean())
    var = 0.5 * (((x0 - mean) ** 2).mean() + ((xt - mean) ** 2).mean())
    rho = ((x0 - mean) * (xt - mean)).mean() / var
    assert row["autocorrelation"] == pytest.approx(rho, abs=1e-6)


def _ar1(rng, phi, n, mean):
    """A stationary AR(1) series of unit variance about `mean` (autocorrelation phi^lag)."""
    x = np.empty(n)
    x[0] = rng.normal()
    noise = rng.normal(size=n) * np.sqrt(1.0 - phi**2)
    for t in range(1, n):
        x[t] = phi * x[t - 1] + noise[t]
    return x + mean


def _two_descriptor_folds(rng, phi_slow, n_folds=3, n=3000, shift=4.0):
    """Per-state, per-fold moments of two descriptors that separate two states equally
    well (means 0 and `shift`, unit variance within each state); descriptor 0 moves
    slowly inside the states (AR(1) with phi_slow), descriptor 1 is white noise."""
    from cvdesign.stats.moments import LaggedMoments, Moments

    moments, lagged = [], []
    for mean in (0.0, shift):
        ms, ls = [], []
        for _ in range(n_folds):
            x = np.column_stack([_ar1(rng, phi_slow, n, mean), rng.normal(mean, 1.0, n)])
            ms.append(Moments.from_data(x))
            ls.append(LaggedMoments.from_series(x, lag=1))
        moments.append(ms)
        lagged.append(ls)
    return FoldMoments(moments, None, lagged)


def test_both_prefers_the_descriptor_that_is_slow_within_the_states():
    # Two descriptors separate the states equally well (Fisher ratio (4/2)^2 = 4); one
    # relaxes slowly inside the states (AR(1), phi = 0.9: within-state autocorrelation 0.9
    # at lag 1, Box and Jenkins, Time Series Analysis, 1970), the other is white noise
    # (0). About one common mean both look equally slow (between-state offsets dominate:
    # about J/(1+J) = 0.8); within the states they differ, and `both` ranks on that.
    fm = _two_descriptor_folds(np.random.default_rng(3), phi_slow=0.9)
    common = [autocorrelation_along(np.ones(1), fm.lagged_pooled(), [i]) for i in (0, 1)]
    within = [autocorrelation_along(np.ones(1), fm.within_pooled(), [i]) for i in (0, 1)]
    assert abs(common[0] - common[1]) < 0.2 and min(common) > 0.75
    assert within[0] == pytest.approx(0.9, abs=0.03) and abs(within[1]) < 0.05
    slow_score = heldout_score(fm, [0], objective="both")[0]
    fast_score = heldout_score(fm, [1], objective="both")[0]
    j = heldout_score(fm, [0], objective="separate")[0]
    assert slow_score == pytest.approx(j / (1 + j) * (1 + within[0]) / 2, rel=0.05)
    assert slow_score > 1.5 * fast_score


def test_both_keeps_a_clean_fast_separator_above_a_slow_one_of_under_half_its_separation():
    # A perfectly separating descriptor that is fast within the states (J/(1+J) near 1)
    # against a slow one whose J/(1+J) is about 0.2, under half of it: the within-state
    # factor, in [1/2, 1], may at most halve the score, so the slow one stays below.
    fm = _two_descriptor_folds(np.random.default_rng(4), phi_slow=0.95, shift=1.0)
    clean = _two_descriptor_folds(np.random.default_rng(5), phi_slow=0.0, shift=40.0)
    poor_slow = heldout_score(fm, [0], objective="both")[0]
    clean_fast = heldout_score(clean, [1], objective="both")[0]
    assert clean_fast > poor_slow


def test_both_can_put_a_slow_overlapping_cv_above_a_fast_clean_one():
    # J/(1+J) saturates: a slow descriptor of J about 1.4 (means 0 and 2.4, unit variance:
    # (2.4/2)^2) scores about 0.58 * 0.97, above a fast, fully separating one (J about
    # 400), about 1.0 * 0.5. So `both` can reorder CVs that separate well; it only never
    # more than halves a score (what the docs say).
    fm = _two_descriptor_folds(np.random.default_rng(4), phi_slow=0.95, shift=2.4)
    clean = _two_descriptor_folds(np.random.default_rng(5), phi_slow=0.0, shift=40.0)
    j_slow = heldout_score(fm, [0], objective="separate")[0]
    assert 1.0 < j_slow < 2.0
    slow_score = heldout_score(fm, [0], objective="both")[0]
    clean_fast = heldout_score(clean, [1], objective="both")[0]
    assert clean_fast == pytest.approx(0.5, abs=0.02)
    assert slow_score > clean_fast


def test_within_states_equals_the_covariances_of_each_state_about_its_own_mean():
    from cvdesign.search import within_states
    from cvdesign.stats.moments import LaggedMoments

    rng = np.random.default_rng(6)
    runs = [rng.normal(size=(400, 3)) @ rng.normal(size=(3, 3)) + rng.normal(0, 5, 3)
            for _ in range(2)]
    got = within_states([LaggedMoments.from_series(x, lag=2) for x in runs]).covariances()
    # direct: each state's pairs about that state's reversible mean, pooled by pair count
    c0 = ct = 0.0
    for x in runs:
        a, b = x[:-2], x[2:]
        m = 0.5 * (a.mean(axis=0) + b.mean(axis=0))
        a, b = a - m, b - m
        c0 = c0 + 0.5 * (a.T @ a + b.T @ b)
        ct = ct + 0.5 * (a.T @ b + b.T @ a)
    n = 2 * (len(runs[0]) - 2)
    np.testing.assert_allclose(got[1], c0 / n, rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(got[2], ct / n, rtol=1e-10, atol=1e-10)


def test_with_objective_slow_the_heldout_fisher_ratio_is_along_the_cvs_own_fold_directions(
        demo_files, monkeypatch):
    # Found in review: the held-out Fisher ratio (and its bootstrap interval) of a 'slow'
    # CV came from a discriminant refitted on the CV's features, which separates better
    # than the CV's own (TICA) direction: a slow CV that does not separate the states was
    # reported as separating. It is now measured along the TICA directions fitted
    # without each fold.
    import cvdesign.pipeline.ranking as ranking
    from cvdesign.search import cv_direction

    seen = []
    along = ranking.heldout_fisher_along

    def spy(fm, idx, directions):
        out = along(fm, idx, directions)
        for k, w in enumerate(directions):  # the CV's own direction without fold k
            ref = cv_direction(fm, idx, objective="slow", fold=k)
            assert abs(abs(float(w @ ref)) - 1.0) < 1e-9
        seen.append(out[0])
        return out

    monkeypatch.setattr(ranking, "heldout_fisher_along", spy)
    top, states = demo_files
    res = suggest(Source.from_states(top, states), objective="slow", lag=1.0, max_terms=2,
                  n_suggestions=3, n_bootstrap=0)
    assert [row["heldout_fisher_ratio"] for row in res.ranking] == seen
    # a direction to choose: some ranked CV has two features (a dihedral's cos and sin)
    assert any(len(row["terms"]) > 1 for row in res.ranking)
    # the bootstrap's refits measure it the same way (TICA refitted without each fold)
    seen.clear()
    boot = suggest(Source.from_states(top, states), objective="slow", lag=1.0, max_terms=2,
                   n_suggestions=3, n_bootstrap=20)
    assert len(seen) > len(boot.ranking)  # the refits called it too
    for row in boot.ranking:
        low, high = row["heldout_fisher_ratio_ci"]
        assert 0.0 <= low <= high


def test_search_fits_with_dependent_features_drop_them_without_a_warning_each():
    # the searches fit thousands of combinations: a dropped direction is not warned about
    # there (the public functions warn, tests/test_tica.py)
    rng = np.random.default_rng(15)
    x = np.cumsum(rng.normal(size=(600, 2)), axis=0)
    lagged = LaggedMoments.from_series(np.c_[x, x[:, 0] + x[:, 1]], 2)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        w, ev = slow_direction(lagged, [0, 1, 2])
    assert w.shape == (3,) and 0.9 < ev < 1.0
