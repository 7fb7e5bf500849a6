"""The main job end to end on the demo, and on real MD data."""

import json

import mdtraj as md
import numpy as np
import pytest

from cvdesign import InputError, Source, load_spec, suggest


def _slow_id(manifest):
    return "dihedral:" + "-".join(map(str, manifest["slow_dihedral"]["atoms"]))


def test_demo_rank1_contains_the_descriptor_slow_by_construction(demo_result, demo_manifest):
    rank1 = demo_result.ranking[0]
    assert _slow_id(demo_manifest) in {t["descriptor"] for t in rank1["terms"]}
    # Held-out scoring by whole trajectories (3 per state in the demo).
    assert any("by whole trajectories" in n for n in demo_result.notes)
    assert rank1["heldout_overlap"] < 0.01
    assert rank1["heldout_fisher_ratio"] > 10


def test_demo_cv_fitted_on_two_runs_separates_the_third_run_of_each_state(demo_files,
                                                                          demo_manifest):
    # An independent held-out check: fit on runs 1-2 of each state, evaluate the spec on
    # run 3 (never read by the fit) and classify by the midpoint of the state means.
    top, states = demo_files
    train = {s: files[:2] for s, files in states.items()}
    result = suggest(Source.from_states(top, train))
    from cvdesign.spec import Spec

    spec = Spec.from_dict(result.specs[0])
    means = {s: v["mean"] for s, v in spec.states.items()}
    (s0, m0), (s1, m1) = means.items()
    cut = 0.5 * (m0 + m1)
    for state, files in states.items():
        traj = md.load(files[2], top=top)
        v = spec.evaluate(traj.xyz)
        side = (v > cut) if (means[state] > cut) else (v < cut)
        assert side.mean() > 0.99, state


def test_apply_reproduces_state_means_stored_in_spec(demo_result, demo_files):
    top, states = demo_files
    from cvdesign.spec import Spec

    for spec_doc in demo_result.specs[:3]:
        spec = Spec.from_dict(spec_doc)
        for state, files in states.items():
            values = np.concatenate([spec.evaluate(md.load(f, top=top).xyz) for f in files])
            ref = spec.states[state]
            assert values.mean() == pytest.approx(ref["mean"], rel=1e-5)
            assert values.std() == pytest.approx(ref["std"], rel=1e-4)
            assert values.size == ref["n_frames"]


def test_specs_match_their_ranking_entries(demo_result):
    assert [r["spec"] for r in demo_result.ranking][:2] == ["cv-01.json", "cv-02.json"]
    for r, spec in zip(demo_result.ranking, demo_result.specs):
        assert spec["name"] == r["spec"][:-5]
        assert [t["weight"] for t in spec["terms"]] == [t["weight"] for t in r["terms"]]
        assert np.linalg.norm([t["weight"] for t in r["terms"]]) == pytest.approx(1.0)


def test_scorecard_lists_every_descriptor_once(demo_result):
    ids = [row["id"] for row in demo_result.scorecard]
    assert len(ids) == len(set(ids)) == len(demo_result.pool)
    fisher = [row["fisher_ratio"] for row in demo_result.scorecard]
    assert fisher == sorted(fisher, reverse=True)


def test_same_input_gives_byte_identical_outputs(demo_files, tmp_path):
    top, states = demo_files
    outs = []
    for k in range(2):
        res = suggest(Source.from_states(top, states), max_terms=2, n_suggestions=3)
        outs.append(res.write(tmp_path / f"run{k}"))
    names = sorted(p.name for p in outs[0].iterdir())
    assert names == sorted(p.name for p in outs[1].iterdir())
    for name in names:
        assert (outs[0] / name).read_bytes() == (outs[1] / name).read_bytes(), name


def _assert_close(a, b):
    """Equal structure and text; numbers equal to 1e-9 relative."""
    if isinstance(a, dict):
        assert a.keys() == b.keys()
        for k in a:
            _assert_close(a[k], b[k])
    elif isinstance(a, list):
        assert len(a) == len(b)
        for x, y in zip(a, b):
            _assert_close(x, y)
    elif isinstance(a, float):
        assert a == pytest.approx(b, rel=1e-9, abs=1e-12)
    else:
        assert a == b


def test_per_frame_labels_give_the_same_statistics_as_files_per_state(demo_files, tmp_path):
    # One trajectory holding both states with a label array, against two files.
    top, states = demo_files
    a = md.load(states["closed"][0], top=top)
    b = md.load(states["open"][0], top=top)
    joined = md.join([a, b])
    joined.time = np.arange(joined.n_frames) * 0.2
    path = tmp_path / "both.xtc"
    joined.save_xtc(str(path))
    labels = ["closed"] * a.n_frames + ["open"] * b.n_frames
    r1 = suggest(Source.from_labels(top, path, labels), max_terms=1, n_suggestions=1)
    src2 = Source(top).add(str(path), "closed", frames=(0, a.n_frames))
    src2.add(str(path), "open", frames=(a.n_frames, None))
    r2 = suggest(src2, max_terms=1, n_suggestions=1)
    # the same frames, merged in another tree (one file's leaves, or two frame ranges'):
    # equal up to the last bits of the sums
    _assert_close(r1.ranking[0]["terms"], r2.ranking[0]["terms"])
    _assert_close(r1.ranking[0]["states"], r2.ranking[0]["states"])
    note = next(n for n in r1.notes if "contiguous blocks" in n)
    # blocks that border each other leak slow motions into the held-out frames: said
    assert "the held-out scores are somewhat optimistic" in note


def test_only_one_state_is_refused(demo_files):
    top, states = demo_files
    with pytest.raises(InputError, match=r"only one state was given \('closed'\)"):
        suggest(Source.from_states(top, {"closed": states["closed"]}))


def test_state_without_frames_is_refused(demo_files):
    top, states = demo_files
    src = Source(top).add(states["closed"][0], "closed")
    src.add(states["open"][0], "open", frames=(5000, 6000))  # the file has 2000 frames
    with pytest.raises(InputError, match=r"state\(s\) 'open' have no frames"):
        suggest(src)


def test_labels_of_wrong_length_are_refused(demo_files):
    top, states = demo_files
    src = Source.from_labels(top, states["closed"][0], ["a"] * 10 + ["b"] * 10)
    with pytest.raises(InputError, match="has more frames than its 20 labels"):
        suggest(src)


# ---------------------------------------------------------------- real MD data
# Adenylate kinase (AdK, 214 residues) closed-to-open transition from the MDAnalysis test
# data (adk.psf + adk_dims.dcd: a DIMS transition, Beckstein, Denning, Perilla and Woolf,
# J. Mol. Biol. 394:160, 2009). Domains as defined there (from memory): CORE 1-29, 60-121,
# 160-214; NMP 30-59; LID 122-159. The closed/open change is the LID and NMP domains
# closing over the CORE, so a separating CA-CA distance must join two different domains
# (the domain of a residue: the `adk_domain` fixture of conftest.py).


@pytest.fixture(scope="module")
def adk_result(mda_data):
    src = Source(str(mda_data / "adk.psf"))
    src.add(str(mda_data / "adk_dims.dcd"), "closed", frames=(0, 30))
    src.add(str(mda_data / "adk_dims.dcd"), "open", frames=(68, 98))
    return src, suggest(src, selection="name CA", max_terms=3, n_suggestions=3)


def test_adk_top_descriptors_join_different_domains(adk_result, adk_domain):
    src, result = adk_result
    top = src.topology
    for row in result.scorecard[:10]:
        a, b = row["atoms"]
        da, db = (adk_domain(top.atom(i).residue.resSeq) for i in (a, b))
        assert da != db, row["label"]
    for term in result.ranking[0]["terms"]:
        a, b = term["atoms"]
        assert adk_domain(top.atom(a).residue.resSeq) != adk_domain(top.atom(b).residue.resSeq)


def test_adk_spec_round_trip_on_psf_dcd(adk_result, mda_data, tmp_path):
    src, result = adk_result
    path = tmp_path / "cv.json"
    path.write_text(json.dumps(result.specs[0]))
    spec = load_spec(path, topology=str(mda_data / "adk.psf"))
    traj = md.load(str(mda_data / "adk_dims.dcd"), top=str(mda_data / "adk.psf"))
    v = spec.evaluate(traj.xyz)
    assert v[:30].mean() == pytest.approx(spec.states["closed"]["mean"], rel=1e-5)
    assert v[68:].mean() == pytest.approx(spec.states["open"]["mean"], rel=1e-5)
    # The CV moves from closed to open along the transition path.
    assert spec.states["closed"]["mean"] < spec.states["open"]["mean"]


def test_ranking_csv_says_whether_each_timescale_is_resolved(demo_files):
    # The demo's slow torsion never crosses in a 400 ps run, so the rank-1 implied
    # timescale is beyond the longest run: not resolved (0), the same as ranking.json.
    import csv
    import io

    top, states = demo_files
    src = Source.from_states(top, {s: files[:1] for s, files in states.items()})
    result = suggest(src, max_terms=1, n_suggestions=2, n_bootstrap=0)
    rows = list(csv.DictReader(io.StringIO(result.ranking_csv())))
    assert "timescale_resolved" in rows[0]
    for row, entry in zip(rows, result.ranking):
        expected = {None: "", True: "1", False: "0"}[entry["timescale_resolved"]]
        assert row["timescale_resolved"] == expected
    rank1 = result.ranking[0]
    assert rank1["timescale_ps"] > rank1["longest_run_ps"]
    assert rows[0]["timescale_resolved"] == "0"


def test_the_topology_is_hashed_and_fingerprinted_once_per_run_not_per_spec(demo_files,
                                                                            monkeypatch):
    # every spec records the same topology identity and file checksum: a run of several
    # specs computes them once (a pass over every atom, the file read in full)
    import cvdesign.pipeline.specs as specs

    top, states = demo_files
    calls = {"sha256": [], "fingerprint": 0}
    sha256, fingerprint = specs.file_sha256, specs.topology_fingerprint

    def counted_sha256(path, *a, **k):
        calls["sha256"].append(str(path))
        return sha256(path, *a, **k)

    def counted_fingerprint(t):
        calls["fingerprint"] += 1
        return fingerprint(t)

    monkeypatch.setattr(specs, "file_sha256", counted_sha256)
    monkeypatch.setattr(specs, "topology_fingerprint", counted_fingerprint)
    res = suggest(Source.from_states(top, states), max_terms=2, n_suggestions=3,
                  n_bootstrap=0)
    assert len(res.specs) == 3
    assert calls["sha256"].count(top) == 1 and calls["fingerprint"] == 1
    first = res.specs[0]
    for spec in res.specs[1:]:  # the same record in each
        assert spec["topology"] == first["topology"]
        assert spec["provenance"]["topology"] == first["provenance"]["topology"]
        assert spec["provenance"]["segments"] == first["provenance"]["segments"]


def test_summary_points_at_the_bias_hints_that_carry_warnings(demo_result):
    # the hints' warnings (a rate above the usual, a time below the frame spacing) were only
    # in the spec files: nothing in summary.md said to read them
    text = demo_result.summary_md()
    counts = [(r["spec"], len(r["hints"]["warnings"])) for r in demo_result.ranking
              if r.get("hints") and r["hints"]["warnings"]]
    assert counts  # the demo's fast CVs get such warnings
    line = next(x for x in text.splitlines() if x.startswith("Bias hints with warnings"))
    assert line.endswith(": " + ", ".join(f"{s} {n}" for s, n in counts) + ".")


def test_ranking_follows_the_one_standard_error_rule_over_every_combination_found(
        demo_files, monkeypatch):
    """Rebuilt here from the combinations the search found: drop a combination that a proper
    subset scores within one standard error of; then repeatedly the best remaining, and of
    those within one standard error of it the fewest terms (Hastie, Tibshirani and Friedman,
    *The Elements of Statistical Learning*, 2nd ed. 2009, sect. 7.10). (The ranks being
    1, 2, ... said nothing: they are numbered in order.)"""
    import cvdesign.pipeline.ranking as ranking

    found = []
    real = ranking.greedy_search

    def recording(*args, **kw):
        combos = real(*args, **kw)
        found.extend(combos)
        return combos

    monkeypatch.setattr(ranking, "greedy_search", recording)
    top, states = demo_files
    res = suggest(Source.from_states(top, {k: v[:3] for k, v in states.items()}),
                  n_bootstrap=0, max_terms=3, n_suggestions=6)
    sets = [frozenset(c.members) for c in found]
    pool = [c for i, c in enumerate(found)
            if not any(sets[j] < sets[i] and o.score >= c.score - c.se
                       for j, o in enumerate(found))]
    expected = []
    while pool and len(expected) < 6:
        best = max(c.score for c in pool)
        best_se = next(c.se for c in pool if c.score == best)
        near = [c for c in pool if c.score >= best - best_se]
        fewest = min(c.n_terms for c in near)
        pick = max((c for c in near if c.n_terms == fewest), key=lambda c: c.score)
        expected.append(pick)
        pool.remove(pick)
    got = [(r["n_terms"], r["heldout_score"], r["heldout_score_se"]) for r in res.ranking]
    assert got == [(c.n_terms, c.score, c.se) for c in expected]
    # the rule had something to decide: larger combinations found, and left out or behind
    assert len(found) > len(got) and any(c.n_terms > 1 for c in found)


def test_objective_both_on_few_lagged_pairs_per_fold_is_warned_about(demo_files):
    """Objective 'both' weighs separation by an autocorrelation within the states: from a
    few dozen pairs per state and fold that weight is noise (a review saw rank 1 change with
    every lag on 30-frame runs); the summary says so, and not for runs with enough pairs."""
    from cvdesign.pipeline.suggest import MIN_WITHIN_PAIRS

    top, states = demo_files
    kw = dict(objective="both", lag=1.0, n_bootstrap=0, max_terms=1, n_suggestions=1)

    def run(frames):
        src = Source(top)
        for name, files in states.items():
            for f in files[:2]:
                src.add(f, name, frames=frames)
        return suggest(src, **kw).notes

    few = [n for n in run((0, 60)) if "rests on" in n]
    assert len(few) == 1 and few[0].startswith("warning: objective 'both' weighs each CV")
    fewest = int(few[0].split("rests on ")[1].split()[0])
    assert 0 < fewest < MIN_WITHIN_PAIRS
    assert not [n for n in run((0, 2000)) if "rests on" in n]
