"""Notebook and pandas fit: the short repr and the HTML table of `Suggestions`, its
DataFrames against the CSV files, and the estimators' pandas output.

The results are real runs of `suggest` on the bundled demo; the estimators are checked on
Fisher's iris data (Fisher 1936, Annals of Eugenics 7:179; the copy bundled with
scikit-learn) and on seeded random series.
"""

import dataclasses
import json
import sys
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from sklearn.datasets import load_iris
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from cvdesign.fit import HLDA, LDA, TICA
from cvdesign.io.source import Source
from cvdesign.pipeline.output import Suggestions
from cvdesign.pipeline.suggest import suggest


@pytest.fixture
def pd():
    return pytest.importorskip("pandas", reason="pandas is an optional extra (cvdesign[pandas])")


@pytest.fixture(scope="module")
def both_result(demo_files):
    """A small run without a bootstrap (no intervals) and with a slowness objective."""
    top, states = demo_files
    return suggest(Source.from_states(top, states), objective="both", lag=2.0, max_terms=2,
                   n_suggestions=3, n_bootstrap=0)


def _long_names(result):
    """`result` with ten long state names and a rank-1 CV of eight terms with long labels."""
    first = dict(result.ranking[0])
    term = dict(first["terms"][0], label="dist " + "VERYLONGRESIDUENAME:C3-" * 12 + "C6")
    first["terms"] = [term] * 8
    return dataclasses.replace(result, states=[f"state-{k}-" + "x" * 60 for k in range(10)],
                               ranking=[first] + result.ranking[1:])


# ------------------------------------------------------------------------------ repr


def test_repr_is_a_few_lines_with_states_pool_rank_1_terms_and_heldout_scores(demo_result):
    text = repr(demo_result)
    lines = text.splitlines()
    r = demo_result.ranking[0]
    assert len(text) < 500 and len(lines) <= 8
    assert lines[0] == "<Suggestions: states closed, open; objective separate, lag 2 ps"
    assert lines[1] == (f" pool of {len(demo_result.pool)} descriptors; "
                        f"{len(demo_result.ranking)} ranked CVs")
    assert f"rank 1 ({r['spec']})" in lines[2]
    for t, line in zip(r["terms"], lines[3:]):
        assert line == f"   {t['weight']:+.3g} {t['transform']}({t['label']})"
    assert (f" held-out J {r['heldout_fisher_ratio']:.3g} +/- {r['heldout_fisher_ratio_se']:.2g}, "
            f"overlap {r['heldout_overlap']:.3f}, autocorr. {r['heldout_autocorrelation']:.3f}"
            in lines)
    assert "not guarantees" in lines[-1] and text.endswith(">")
    # the dataclass is unchanged: its fields, equality, and the pool it holds
    assert [f.name for f in dataclasses.fields(Suggestions)][:5] == [
        "states", "pool", "scorecard", "ranking", "specs"]
    assert dataclasses.replace(demo_result) == demo_result


def test_repr_names_the_objective_score_when_the_objective_is_not_separation(both_result):
    r = both_result.ranking[0]
    assert f"held-out both score {r['heldout_score']:.3g} +/- {r['heldout_score_se']:.2g}, J " \
        in repr(both_result)


def test_repr_stays_short_for_a_big_pool_many_states_and_long_labels(demo_result):
    # repr reads only len(pool): a stand-in of the size of a heavy-atom protein pool
    big = dataclasses.replace(_long_names(demo_result), pool=range(117_000))
    text = repr(big)
    assert "pool of 117000 descriptors" in text
    assert "   ... and 5 more terms" in text.splitlines()
    assert max(len(line) for line in text.splitlines()) <= 100
    assert len(text) < 650


def test_repr_of_a_result_without_ranking_says_so():
    empty = Suggestions(["a", "b"], pool=None, scorecard=[], ranking=[], specs=[])
    assert repr(empty).splitlines() == ["<Suggestions: states a, b; objective separate",
                                        " 0 ranked CVs",
                                        " (starting points to validate, not guarantees)>"]


# ------------------------------------------------------------------------------ HTML


def _markdown_top_rows(summary):
    """The cells of the top-suggestions table of summary.md."""
    lines = summary.splitlines()
    start = lines.index(next(l for l in lines if l.startswith("| rank | spec | held-out J ± SE over folds |")))
    rows = []
    for line in lines[start + 2:]:
        if not line.startswith("|"):
            break
        rows.append([c.strip() for c in line.strip("|").split(" | ")])
    return rows


def test_repr_html_is_well_formed_and_shows_the_top_table_of_summary_md(demo_result):
    page = demo_result._repr_html_()
    root = ET.fromstring(page)  # well-formed (XML parses it)
    head = [th.text for th in root.iter("th")]
    # the ± after J is named where it is shown (it is there also without bootstrap)
    assert head[:3] == ["rank", "spec", "held-out J ± SE over folds"]
    assert ("± its jackknife standard error over the folds (from the folds, so given also "
            "when there are no bootstrap uncertainties)") in demo_result.summary_md()
    rows = [[td.text or "" for td in tr.iter("td")] for tr in root.find("table/tbody")]
    assert rows == _markdown_top_rows(demo_result.summary_md())
    assert len(rows) == min(5, len(demo_result.ranking))
    assert "starting points to validate" in "".join(root.itertext())


def test_repr_html_escapes_state_names_and_labels_and_loads_nothing(demo_result):
    hostile = "<script>alert('x')</script> & \"q\""
    first = dict(demo_result.ranking[0])
    first["terms"] = [dict(first["terms"][0], label='<img src="http://example.org/a.png">')]
    odd = dataclasses.replace(demo_result, states=[hostile, "a&b"],
                              ranking=[first] + demo_result.ranking[1:])
    page = odd._repr_html_()
    root = ET.fromstring(page)
    assert [c.text for c in root.iter("code")][:2] == [hostile, "a&b"]
    cell = root.find("table/tbody/tr")[-1].text
    assert cell.startswith('cos(<img src="http://example.org/a.png">) ')
    # only the elements written here, with no attribute but the wrapper's class:
    # no script, image, link, style or URL reaches the notebook
    assert {e.tag for e in root.iter()} <= {"div", "p", "strong", "code", "table", "thead",
                                            "tbody", "tr", "th", "td", "small"}
    assert [e.attrib for e in root.iter() if e.attrib] == [{"class": "cvdesign-suggestions"}]


def test_repr_html_stays_small_for_long_names(demo_result):
    page = _long_names(demo_result)._repr_html_()
    assert page.count("<tr>") == 1 + min(5, len(demo_result.ranking))
    assert len(page) < 20_000


# ------------------------------------------------------------------------------ DataFrames


def _assert_frame_equals_csv(pd, frame, path):
    """`frame` holds what the CSV file at `path` holds, read back with pandas.read_csv:
    the same columns in the same order, numbers to the file's 6 significant digits,
    flags as its 1/0, empty cells as missing values."""
    text_columns = [c for c in frame.columns if not pd.api.types.is_numeric_dtype(frame[c])
                    and not pd.api.types.is_bool_dtype(frame[c])]
    read = pd.read_csv(path, dtype={c: str for c in text_columns})
    assert frame.columns.tolist() == read.columns.tolist()
    assert len(frame) == len(read) > 0
    for c in frame.columns:
        ours, theirs = frame[c], read[c]
        if c in text_columns:
            assert ours.isna().tolist() == theirs.isna().tolist(), c
            assert ours.dropna().tolist() == theirs.dropna().tolist(), c
        elif pd.api.types.is_bool_dtype(ours):
            assert ours.isna().tolist() == theirs.isna().tolist(), c
            assert ours.dropna().astype(int).tolist() == theirs.dropna().astype(int).tolist(), c
        elif pd.api.types.is_integer_dtype(ours):
            assert ours.tolist() == theirs.tolist(), c
        else:
            np.testing.assert_allclose(ours.to_numpy(float), theirs.to_numpy(float),
                                       rtol=5e-6, atol=0, equal_nan=True, err_msg=c)
    return read


@pytest.mark.parametrize("which", ["demo_result", "both_result"])
def test_frames_equal_ranking_csv_and_scorecard_csv_read_back_with_pandas(which, pd, request,
                                                                          tmp_path):
    result = request.getfixturevalue(which)
    out = result.write(tmp_path / "out")
    frames = result.to_frames()
    ranking = _assert_frame_equals_csv(pd, frames.ranking, out / "ranking.csv")
    card = _assert_frame_equals_csv(pd, frames.scorecard, out / "scorecard.csv")
    assert len(frames.ranking) == len(result.ranking)
    assert len(frames.scorecard) == len(result.scorecard) == len(result.pool)
    # intervals: filled with the bootstrap, missing (NaN, an empty CSV cell) without it
    has_ci = which == "demo_result"
    assert frames.ranking["fisher_ratio_ci_low"].notna().all() == has_ci
    assert ranking["fisher_ratio_ci_low"].notna().all() == has_ci
    assert frames.scorecard["fisher_ratio_ci_high"].notna().any() == has_ci
    assert card["fisher_ratio_ci_high"].notna().any() == has_ci
    # full precision in the frames, the rounded value in the files
    assert frames.ranking["heldout_fisher_ratio"].tolist() == [
        r["heldout_fisher_ratio"] for r in result.ranking]


def test_terms_frame_holds_each_term_of_the_spec_files(demo_result, pd, tmp_path):
    out = demo_result.write(tmp_path / "out")
    terms = demo_result.to_frames().terms
    expected = []
    for r in demo_result.ranking:
        spec = json.loads((out / r["spec"]).read_text(encoding="utf-8"))
        for k, t in enumerate(spec["terms"], 1):
            expected.append((r["rank"], r["spec"], k, t["descriptor"], t["transform"],
                             t["weight"], t["center"], t["scale"]))
    got = list(terms[["rank", "spec", "term", "descriptor", "transform", "weight", "center",
                      "scale"]].itertuples(index=False, name=None))
    assert [g[:5] for g in got] == [e[:5] for e in expected]
    # the spec files round to 12 significant digits
    np.testing.assert_allclose(np.array([g[5:] for g in got]), np.array([e[5:] for e in expected]),
                               rtol=1e-11, atol=1e-300)
    # the intervals and selection frequencies are the per-term cells of ranking.csv
    assert terms["weight_ci_low"].notna().all() and terms["selection_frequency"].notna().all()
    rank1 = terms[terms["rank"] == 1]
    cell = demo_result.to_frames().ranking.loc[0, "weight_ci"]
    assert cell == " ".join(f"[{lo:.6g},{hi:.6g}]" for lo, hi in
                            zip(rank1["weight_ci_low"], rank1["weight_ci_high"]))


def test_to_frames_without_pandas_names_the_package_and_writes_nothing(demo_result, monkeypatch,
                                                                      tmp_path):
    monkeypatch.chdir(tmp_path)
    monkeypatch.setitem(sys.modules, "pandas", None)  # as if pandas were not installed
    with pytest.raises(ModuleNotFoundError,
                       match=r"Suggestions\.to_frames\(\) needs pandas, which is not installed: "
                             r"install it with 'pip install pandas'"):
        demo_result.to_frames()
    assert list(tmp_path.iterdir()) == []
    # the rest of the result works without pandas
    assert "ranked CVs" in repr(demo_result) and "<table>" in demo_result._repr_html_()


# ------------------------------------------------------------------------------ estimators


@pytest.mark.parametrize("cls", [LDA, HLDA])
def test_discriminants_give_named_pandas_columns_with_the_array_values_on_iris(cls, pd):
    X, y = load_iris(return_X_y=True, as_frame=True)
    X.index = X.index + 1000  # the output keeps the input's index
    array_out = cls().fit(X, y).transform(X)
    est = cls().set_output(transform="pandas").fit(X, y)
    prefix = cls.__name__.lower()
    assert est.get_feature_names_out().tolist() == [f"{prefix}0", f"{prefix}1"]
    frame = est.transform(X)
    assert isinstance(frame, pd.DataFrame)
    assert frame.columns.tolist() == [f"{prefix}0", f"{prefix}1"]
    assert frame.index.equals(X.index)
    np.testing.assert_array_equal(frame.to_numpy(), array_out)
    np.testing.assert_array_equal(cls().set_output(transform="pandas").fit_transform(X, y),
                                  array_out)


def test_lda_in_a_pandas_pipeline_on_iris_names_its_output(pd):
    X, y = load_iris(return_X_y=True, as_frame=True)
    pipe = make_pipeline(StandardScaler(), LDA(n_components=1)).set_output(transform="pandas")
    out = pipe.fit_transform(X, y)
    assert out.columns.tolist() == ["lda0"]
    np.testing.assert_array_equal(
        out.to_numpy(), make_pipeline(StandardScaler(), LDA(n_components=1)).fit_transform(X, y))


def _mixed_series(rng, n):
    """Three channels: a slow AR(1) process and white noise mixed, and other white noise."""
    slow = np.zeros(n)
    for t in range(1, n):
        slow[t] = 0.98 * slow[t - 1] + rng.normal()
    fast = rng.normal(size=n)
    return np.c_[slow + fast, slow - fast, rng.normal(size=n)]


@pytest.mark.parametrize("weighting", [False, True])
def test_tica_pandas_output_names_columns_for_arrays_and_lists_of_trajectories(weighting, pd):
    rng = np.random.default_rng(11)
    a, b = _mixed_series(rng, 600), _mixed_series(rng, 400)
    plain = TICA(lag=5, kinetic_weighting=weighting).fit([a, b])
    est = TICA(lag=5, kinetic_weighting=weighting).set_output(transform="pandas").fit([a, b])
    names = ["tica0", "tica1", "tica2"]
    assert est.get_feature_names_out().tolist() == names
    one = est.transform(a)
    assert isinstance(one, pd.DataFrame) and one.columns.tolist() == names
    np.testing.assert_array_equal(one.to_numpy(), plain.transform(a))
    # a list of trajectories gives a list of DataFrames, one per trajectory
    for out in (est.transform([a, b]),
                TICA(lag=5, kinetic_weighting=weighting).set_output(transform="pandas")
                .fit_transform([a, b])):
        assert isinstance(out, list) and len(out) == 2
        for frame, x in zip(out, (a, b)):
            assert frame.columns.tolist() == names and len(frame) == len(x)
            np.testing.assert_array_equal(frame.to_numpy(), plain.transform(x))
    # fit_transform of one array is fit then transform
    np.testing.assert_array_equal(
        TICA(2, lag=5).set_output(transform="pandas").fit_transform(a).to_numpy(),
        TICA(2, lag=5).fit(a).transform(a))


def test_tica_from_moments_names_its_components_and_refuses_a_mismatched_list(pd):
    from cvdesign.stats.moments import LaggedMoments

    x = _mixed_series(np.random.default_rng(12), 500)
    tica = TICA.from_moments(LaggedMoments.from_series(x, 3, shift=x.mean(axis=0)), lag=3,
                             n_components=2)
    assert tica.get_feature_names_out().tolist() == ["tica0", "tica1"]
    tica.set_output(transform="pandas")
    out = tica.transform(x)
    assert out.columns.tolist() == ["tica0", "tica1"]
    np.testing.assert_array_equal(out.to_numpy(), (x - tica.mean_) @ tica.eigenvectors_)
    with pytest.raises(ValueError, match=r"X\[0\] has 2 features, but TICA was fitted with 3"):
        tica.transform([x[:, :2], x[:, 1:]])


def test_top_table_leaves_unknown_scores_empty(demo_result):
    # a held-out overlap or autocorrelation that could not be measured is None: the table
    # shows an empty cell, never a crash or a made-up 0.000
    import copy

    res = copy.copy(demo_result)
    res.ranking = [dict(r, heldout_overlap=None, heldout_autocorrelation=None)
                   for r in demo_result.ranking[:2]]
    lines = res.top_table().splitlines()
    assert len(lines) == 3 and "0.000" not in lines[1]


def test_the_summary_says_when_there_are_no_intervals_and_when_two_folds_make_the_error_rough(
        demo_files, demo_result):
    """Review findings: the summary described bootstrap intervals and their coverage also
    when none were computed, and gave a two-fold jackknife error (half the difference of two
    scores) without a word on how rough it is."""
    top, states = demo_files
    res = suggest(Source.from_states(top, states), n_folds=2, n_bootstrap=0, max_terms=1,
                  n_suggestions=2, n_seeds=1)
    text = res.summary_md()
    assert len(res.ranking[0]["heldout_fisher_ratio_folds"]) == 2
    assert "with two folds it is half the difference of the two folds' own scores" in text
    assert "No bootstrap intervals or selection frequencies were computed" in text
    assert "Intervals are nominal 95 % block-bootstrap intervals" not in text
    # the demo with its defaults: more folds and intervals, described as such
    full = demo_result.summary_md()
    assert len(demo_result.ranking[0]["heldout_fisher_ratio_folds"]) > 2
    assert "Intervals are nominal 95 % block-bootstrap intervals" in full
    assert "with two folds" not in full


def test_the_specs_carry_the_slowness_the_summary_shows_beside_the_common_mean_one(
        demo_result):
    """Review finding: a spec held only the slowness about one common mean (which pairs
    that never leave their state make slow for every separating CV), while the summary
    showed the within-state or transition measure; the spec now holds those too, with
    their resolved flags as ranking.csv has them."""
    keys = ("heldout_autocorrelation_within_states", "timescale_within_states_ps",
            "heldout_autocorrelation_transitions", "timescale_transitions_ps")
    flags = ("timescale_resolved", "timescale_within_states_resolved",
             "timescale_transitions_resolved")
    seen = 0
    for entry, spec in zip(demo_result.ranking, demo_result.specs):
        for key in keys:
            assert spec["scores"].get(key) == entry.get(key)
            seen += entry.get(key) is not None
        for key in flags:
            want = None if entry.get(key) is None else int(bool(entry[key]))
            assert spec["scores"].get(key) == want
    assert seen >= len(demo_result.specs)  # the within-state autocorrelation at least


def test_a_timescale_from_an_autocorrelation_indistinct_from_zero_is_shown_as_a_bound():
    """Review finding: 0.174 ps at a 1 ps lag was shown as a number, from an autocorrelation
    of 0.003 whose interval reached below 0; the cell now gives the interval's upper end as
    a bound."""
    from cvdesign.pipeline.output import _timescale_text

    entry = {"timescale_ps": 0.174, "timescale_resolved": True, "longest_run_ps": 200.0,
             "longest_visit_ps": 200.0, "timescale_ci_ps": [None, 0.61]}
    assert _timescale_text(entry) == "< 0.61 (autocorrelation at the lag not distinguished " \
                                     "from 0)"
    entry["timescale_ci_ps"] = [0.1, 0.3]
    assert _timescale_text(entry) == "0.174"
    entry["timescale_ci_ps"] = None  # no bootstrap: the number as measured
    assert _timescale_text(entry) == "0.174"
