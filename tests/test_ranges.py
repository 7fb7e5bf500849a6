"""The CV's range (issue 12, item 2): the reachable range from the terms, the observed range
from the pipeline, states at a bound of the CV (folded coordinates), and the hints' grid and
walls against both."""

import csv
import io
import json
import math
import warnings

import mdtraj as md
import numpy as np
import pytest
from scipy import optimize

from cvdesign import Source, Spec, SpecError, load_spec, suggest
from cvdesign.bias.hints import format_hints, spec_hints
from cvdesign.cli import main
from cvdesign.geometry import GeometryWarning, coordination_pairs
from cvdesign.passes import CoordinateFeaturizer, ProjectionRangePass, plan_tasks, run_pass
from cvdesign.spec.ranges import (FOLD_SPREADS, descriptor_value_range, reachable_range,
                                  states_at_bounds)
from cvdesign.testbed.toys import _place as place_atom  # the testbed's own chain builder

#: Atoms of the test chain: 4 dihedrals (t0..t3), 5 bond angles (a0..a4), 6 bonds.
N_CHAIN = 7
BOND_NM = 0.15


def _topology(n_atoms=N_CHAIN):
    top = md.Topology()
    res = top.add_residue("CHN", top.add_chain(), resSeq=1)
    for i in range(n_atoms):
        top.add_atom(f"C{i}", md.element.carbon, res)
    return top


def _chain(angles, torsions):
    """Coordinates (nm) of a chain with these bond angles (N_CHAIN - 2) and dihedrals
    (N_CHAIN - 3), rad, placing one atom per internal coordinate."""
    xyz = [np.zeros(3), np.array([BOND_NM, 0.0, 0.0]),
           np.array([BOND_NM * (1 - math.cos(angles[0])), BOND_NM * math.sin(angles[0]), 0.0])]
    for k, torsion in enumerate(torsions):
        xyz.append(place_atom(xyz[-3], xyz[-2], xyz[-1], BOND_NM, angles[k + 1], torsion))
    return np.array(xyz)


DIHEDRALS = [{"id": f"t{k}", "kind": "dihedral", "atoms": [k, k + 1, k + 2, k + 3]}
             for k in range(N_CHAIN - 3)]
ANGLES = [{"id": f"a{k}", "kind": "angle", "atoms": [k, k + 1, k + 2]} for k in range(N_CHAIN - 2)]


def test_the_chain_builder_sets_the_angles_and_dihedrals_it_is_given():
    rng = np.random.default_rng(0)
    angles, torsions = rng.uniform(0.5, 2.8, N_CHAIN - 2), rng.uniform(-3.0, 3.0, N_CHAIN - 3)
    spec = Spec(name="c", topology=_topology(), descriptors=DIHEDRALS + ANGLES,
                terms=[{"descriptor": "t0", "transform": "cos", "center": 0.0, "scale": 1.0,
                        "weight": 1.0}])
    values = spec.descriptor_values(_chain(angles, torsions)[None])[0]
    np.testing.assert_allclose(values, np.concatenate([torsions, angles]), atol=1e-12)


def _random_trig_spec(rng, n_descriptors):
    """A CV of cos and sin terms on the first `n_descriptors` dihedrals of the chain: the
    first two terms are cos and sin of t0 (shared), then 1-5 more terms on random dihedrals
    (shared or distinct; a descriptor's transform at most once: a spec refuses a repeat);
    random weights, centres, scales and offset."""
    terms = [{"descriptor": "t0", "transform": "cos"}, {"descriptor": "t0", "transform": "sin"}]
    free = [(f"t{k}", t) for k in range(1, n_descriptors) for t in ("cos", "sin")]
    for k in rng.permutation(len(free))[:rng.integers(1, 6)]:
        terms.append({"descriptor": free[k][0], "transform": free[k][1]})
    for t in terms:
        t.update(center=float(rng.uniform(-1, 1)), scale=float(rng.uniform(0.2, 2.0)),
                 weight=float(rng.normal(0.0, 1.5)))
    return Spec(name="trig", topology=_topology(), descriptors=DIHEDRALS, terms=terms,
                offset=float(rng.uniform(-2, 2)))


def _random_geometries(rng, n):
    """Random chains (internal coordinates) and random clouds of atoms, nm."""
    chains = [_chain(rng.uniform(0.2, math.pi - 0.2, N_CHAIN - 2),
                     rng.uniform(-math.pi, math.pi, N_CHAIN - 3)) for _ in range(n)]
    clouds = rng.normal(0.0, 0.3, size=(n, N_CHAIN, 3))
    return np.concatenate([np.array(chains), clouds])


@pytest.mark.parametrize("seed", range(6))
def test_reachable_range_of_random_cos_sin_cvs_contains_every_value_on_random_geometries(seed):
    rng = np.random.default_rng(seed)
    for _ in range(5):
        spec = _random_trig_spec(rng, int(rng.integers(1, N_CHAIN - 2)))
        low, high = spec.reachable_range
        values = spec.evaluate(_random_geometries(rng, 200))
        assert low is not None and high is not None
        tol = 1e-12 * (1.0 + abs(low) + abs(high))
        assert np.all(values >= low - tol) and np.all(values <= high + tol)


def _extreme(spec, sign, rng, n_starts=4):
    """The largest value of sign * CV found by BFGS over the chain's dihedrals (bond angles
    fixed at 1.9 rad), from several random starts; evaluated through Spec.evaluate."""
    angles = np.full(N_CHAIN - 2, 1.9)

    def minus(torsions):
        return -sign * spec.evaluate(_chain(angles, torsions)[None])[0]

    best = -np.inf
    for _ in range(n_starts):
        res = optimize.minimize(minus, rng.uniform(-math.pi, math.pi, N_CHAIN - 3),
                                method="BFGS")
        best = max(best, -res.fun)
    return sign * best


@pytest.mark.parametrize("seed", range(3))
def test_reachable_range_of_random_cos_sin_cvs_is_attained_by_optimizing_the_angles(seed):
    # Chain dihedrals are independent internal coordinates, so every combination of their
    # values is a geometry: the bounds must be reached, not only contain the values. The
    # outside reference is scipy's BFGS (Nocedal and Wright, Numerical Optimization, 2006)
    # over the dihedrals, through the spec's own evaluator.
    rng = np.random.default_rng(100 + seed)
    for _ in range(4):
        spec = _random_trig_spec(rng, int(rng.integers(1, N_CHAIN - 2)))
        low, high = spec.reachable_range
        assert _extreme(spec, -1.0, rng) == pytest.approx(low, abs=1e-3)
        assert _extreme(spec, +1.0, rng) == pytest.approx(high, abs=1e-3)


def test_two_terms_of_one_dihedral_bound_jointly_not_each_on_its_own():
    # 3 cos + 4 sin of one dihedral reaches +-5, not +-7 (terms added separately):
    # a cos x + b sin x = sqrt(a^2 + b^2) cos(x - atan2(b, a)), the harmonic-addition
    # identity of any trigonometry text (e.g. Abramowitz and Stegun, Handbook of
    # Mathematical Functions, 1964, 4.3.17; from memory)
    spec = Spec(name="j", topology=_topology(), descriptors=DIHEDRALS,
                terms=[{"descriptor": "t1", "transform": t, "center": 0.0, "scale": 1.0,
                        "weight": w} for t, w in (("cos", 3.0), ("sin", 4.0))])
    assert spec.reachable_range == (-5.0, 5.0)
    best = math.atan2(4.0, 3.0)  # cos = 0.6, sin = 0.8
    x = _chain(np.full(N_CHAIN - 2, 1.9), [0.0, best, 0.0, 0.0])[None]
    assert spec.evaluate(x)[0] == pytest.approx(5.0, abs=1e-12)


def test_identity_terms_of_angles_distances_and_coordination_give_sound_ranges():
    rng = np.random.default_rng(7)
    descs = DIHEDRALS + ANGLES + [
        {"id": "d", "kind": "distance", "atoms": [0, 6]},
        {"id": "cd", "kind": "center_distance", "groups": [[0, 1], [5, 6]],
         "weighting": "geometric"},
        {"id": "n", "kind": "coordination", "groups": [[0, 1, 2], [2, 3]], "r0": 0.2}]
    for _ in range(10):
        terms = [{"descriptor": did, "transform": "identity",
                  "center": float(rng.uniform(-1, 1)), "scale": float(rng.uniform(0.2, 2.0)),
                  "weight": float(rng.normal(0.0, 1.5))}
                 for did in ("a1", "a3", "n")]
        terms += [{"descriptor": "t2", "transform": "cos", "center": 0.1, "scale": 0.5,
                   "weight": float(rng.normal())}]
        bounded = Spec(name="b", topology=_topology(), descriptors=descs, terms=terms)
        low, high = bounded.reachable_range
        assert low is not None and high is not None  # angles, dihedrals, coordination
        with_distance = Spec(name="u", topology=_topology(), descriptors=descs,
                             terms=terms + [{"descriptor": did, "transform": "identity",
                                             "center": 0.3, "scale": 0.1, "weight": w}
                                            for did, w in (("d", 1.0), ("cd", 0.5))])
        d_low, d_high = with_distance.reachable_range
        assert d_high is None and d_low == pytest.approx(low + (-3.0) + 0.5 * (-3.0))
        xyz = _random_geometries(rng, 100)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", GeometryWarning)
            for spec, (lo, hi) in ((bounded, (low, high)), (with_distance, (d_low, d_high))):
                values = spec.evaluate(xyz)
                assert np.all(values >= lo - 1e-9)
                assert hi is None or np.all(values <= hi + 1e-9)


def test_descriptors_that_constrain_each_other_still_get_a_sound_range():
    # t0 and its reverse are the same angle; three angles at atom 1 constrain each other:
    # the bounds add each descriptor's extremes, which need not be reachable together
    top = _topology()
    descs = [DIHEDRALS[0], {"id": "rev", "kind": "dihedral", "atoms": [3, 2, 1, 0]},
             {"id": "x", "kind": "angle", "atoms": [0, 1, 2]},
             {"id": "y", "kind": "angle", "atoms": [0, 1, 3]},
             {"id": "z", "kind": "angle", "atoms": [2, 1, 3]}]
    terms = [{"descriptor": d, "transform": t, "center": 0.0, "scale": 1.0, "weight": 1.0}
             for d, t in (("t0", "cos"), ("rev", "cos"), ("x", "identity"),
                          ("y", "identity"), ("z", "identity"))]
    spec = Spec(name="c", topology=top, descriptors=descs, terms=terms)
    assert spec.reachable_range == pytest.approx((-2.0, 2.0 + 3 * math.pi))
    values = spec.evaluate(np.random.default_rng(3).normal(0, 0.3, (500, N_CHAIN, 3)))
    assert values.min() >= -2.0 and values.max() <= 2.0 + 3 * math.pi
    assert values.max() < 2.0 + 2 * math.pi + 1e-9  # three angles at one atom sum to <= 2 pi


@pytest.mark.parametrize("seed", range(5))
def test_coordination_range_counts_the_pairs_of_coordination_pairs(seed):
    rng = np.random.default_rng(seed)
    a = sorted(rng.choice(12, size=rng.integers(1, 8), replace=False).tolist())
    b = sorted(rng.choice(12, size=rng.integers(1, 8), replace=False).tolist())
    if len(coordination_pairs(a, b)) == 0:
        pytest.skip("no pair")
    low, high = descriptor_value_range({"kind": "coordination", "groups": [a, b]})
    assert (low, high) == (0.0, float(len(coordination_pairs(a, b))))


def test_a_periodic_cv_ranges_over_one_period_and_its_grid_spans_it():
    top = _topology()
    spec = Spec(name="p", topology=top, descriptors=[DIHEDRALS[1]],
                terms=[{"descriptor": "t1", "transform": "identity", "center": 1.0,
                        "scale": 0.5, "weight": -1.5}], periodic=True, offset=0.25,
                states={"a": {"mean": 2.0, "std": 0.3, "n_frames": 10},
                        "b": {"mean": -3.0, "std": 0.4, "n_frames": 10}})
    low, high = spec.reachable_range
    assert high - low == pytest.approx(spec.period)
    assert (low, high) == pytest.approx((0.25 - 3 * (math.pi - 1.0), 0.25 + 3 * (math.pi + 1.0)))
    values = spec.evaluate(_random_geometries(np.random.default_rng(1), 300))
    assert values.min() >= low and values.max() <= high
    assert all("at_bound" not in st for st in spec.states.values())  # wrapped, not folded
    h = spec_hints(spec, temperature=300.0, md_step_fs=2.0, barrier=30.0)
    assert h["walls"] is None and h["grid"]["periodic"] and h["grid"]["covers_reachable"]
    assert (h["grid"]["lower"], h["grid"]["upper"]) == (low, high)


# ---------------------------------------------------------------------------- the spec's keys
def _cos_spec(**kwargs):
    return Spec(name="cos", topology=_topology(), descriptors=DIHEDRALS,
                terms=[{"descriptor": "t0", "transform": "cos", "center": 0.0, "scale": 0.5,
                        "weight": 1.0}], **kwargs)


def test_a_new_spec_stores_its_reachable_range_and_round_trips_through_json():
    spec = _cos_spec(observed_range=(-1.5, 1.9))
    doc = json.loads(spec.to_json())
    assert doc["reachable_range"] == {"lower": -2.0, "upper": 2.0}
    assert doc["observed_range"] == {"lower": -1.5, "upper": 1.9}
    again = Spec.from_json(spec.to_json())
    assert again == spec and again.reachable_range == (-2.0, 2.0)
    assert again.observed_range == (-1.5, 1.9)


def test_a_reachable_range_left_over_from_edited_terms_is_refused_naming_the_key(tmp_path):
    doc = _cos_spec().to_dict()
    doc["terms"][0]["weight"] = 2.0  # the range is now +-4
    path = tmp_path / "edited.json"
    path.write_text(json.dumps(doc))
    with pytest.raises(SpecError, match=r"^\$\.reachable_range\.lower: must be -4\.0 for these "
                                        r"terms, the lower end of the values the CV can reach.*"
                                        r"got -2\.0.*recompute the range, or remove "
                                        r"reachable_range \[spec file '.*edited\.json'\]$"):
        load_spec(path)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["edited.json"]
    doc["reachable_range"] = {"lower": -4.0, "upper": None}
    with pytest.raises(SpecError, match=r"^\$\.reachable_range\.upper: must be 4\.0 .*got None"):
        Spec.from_dict(doc)


@pytest.mark.parametrize("where,value,match", [
    ("observed_range", {"lower": 1.0, "upper": 0.5},
     r"^\$\.observed_range: lower \(1\.0\) must not exceed upper \(0\.5\)"),
    ("states", {"a": {"mean": 0.0, "std": 0.1, "n_frames": 3, "min": 2.0, "max": 1.0}},
     r"^\$\.states\.a: min \(2\.0\) must not exceed max \(1\.0\)"),
    ("states", {"a": {"mean": 0.0, "std": 0.1, "n_frames": 3, "at_bound": "top"}},
     r"^\$\.states\.a\.at_bound: \"top\" is not one of 'lower', 'upper'"),
])
def test_inconsistent_observed_ranges_and_unknown_bounds_are_refused(where, value, match):
    doc = _cos_spec().to_dict()
    doc[where] = value
    with pytest.raises(SpecError, match=match):
        Spec.from_dict(doc)


def test_a_spec_written_without_ranges_still_loads_and_gets_its_range_from_the_terms():
    doc = _cos_spec().to_dict()
    del doc["reachable_range"]
    old = Spec.from_dict(doc)
    assert "reachable_range" not in json.loads(old.to_json())  # loading adds nothing
    assert old.reachable_range == (-2.0, 2.0) and old.observed_range is None


def test_the_constructor_flags_a_state_at_a_bound_and_leaves_the_others():
    # cos(t0) / 0.5 reaches [-2, 2]; 'cis' sits 0.7 std below 2, 'mid' far from both ends
    spec = _cos_spec(states={"cis": {"mean": 1.93, "std": 0.1, "n_frames": 50},
                             "mid": {"mean": 0.0, "std": 0.5, "n_frames": 50}})
    assert spec.states["cis"]["at_bound"] == "upper"
    assert "at_bound" not in spec.states["mid"]


def test_states_at_bounds_uses_fold_spreads_standard_deviations():
    reach = (-1.0, None)
    at = {"mean": -1.0 + FOLD_SPREADS * 0.1, "std": 0.1}
    beyond = {"mean": -1.0 + FOLD_SPREADS * 0.1 + 1e-6, "std": 0.1}
    assert states_at_bounds({"at": at, "beyond": beyond}, reach) == {"at": "lower"}
    assert states_at_bounds({"x": {"mean": 5.0, "std": 0.0}}, (5.0, 5.0)) == {"x": "lower"}
    assert reachable_range([{"id": "d", "kind": "distance"}],
                           [{"descriptor": "d", "transform": "identity", "center": 0.0,
                             "scale": 1.0, "weight": -1.0}]) == (None, 0.0)


# ---------------------------------------------------------------------------- the pass
def test_projection_range_pass_is_exact_and_the_same_for_any_split(tmp_path, assert_same,
                                                                    shuffled_executor,
                                                                    random_tasks):
    rng = np.random.default_rng(11)
    top = _topology(3)
    src, coords = Source(top), []
    for i, (state, frames) in enumerate([("a", None), ("b", (3, 40)), ("a", (0, 17))]):
        xyz = rng.normal(1.0, 0.4, size=(45, 3, 3)).astype(np.float32)
        path = str(tmp_path / f"r{i}.dcd")
        md.Trajectory(xyz, top).save(path)
        src.add(path, state, frames=frames)
        lo, hi = frames or (0, 45)
        coords.append((state, md.load(path, top=top).xyz[lo:hi].reshape(hi - lo, -1)))
    cols = np.array([7, 0, 4, 2])
    center, scale = rng.normal(size=4), rng.uniform(0.5, 2.0, 4)
    projections = [([0, 2], [0.7, -1.3]), ([3], [2.0]), ([1, 0, 3], [0.1, 0.2, -0.4])]
    rp = ProjectionRangePass(CoordinateFeaturizer([0, 1, 2]), projections, columns=cols,
                             center=center, scale=scale)
    plan = plan_tasks(src, leaf_frames=4)
    reference = run_pass(rp, src, tasks=plan)
    other = run_pass(rp, src, tasks=plan.with_tasks(random_tasks(plan, rng)),
                     executor=shuffled_executor(5), chunk_frames=7)
    assert_same(reference, other)
    for s, state in enumerate(src.states):
        x = np.concatenate([c for name, c in coords if name == state]).astype(np.float64)
        z = (x[:, cols] - center) / scale
        for p, (pos, w) in enumerate(projections):
            v = z[:, pos[0]] * w[0]
            for j, wj in zip(pos[1:], w[1:]):
                v = v + z[:, j] * wj
            assert reference[0, p, s] == v.min() and reference[1, p, s] == v.max()


# ---------------------------------------------------------------------------- the pipeline
@pytest.fixture(scope="module")
def demo_run(demo_files, tmp_path_factory):
    """`suggest` on two runs of each demo state (600 frames each), written out."""
    top, states = demo_files
    src = Source(top)
    for name, files in states.items():
        for f in files[:2]:
            src.add(f, name, frames=(0, 600))
    result = suggest(src, n_bootstrap=0, max_terms=2, n_suggestions=3)
    out = tmp_path_factory.mktemp("range") / "out"
    result.write(out)
    return src, result, out


def test_observed_range_equals_the_extremes_of_spec_evaluate_over_the_input_frames(demo_run):
    src, result, out = demo_run
    for doc in result.specs:
        spec = load_spec(out / f"{doc['name']}.json")
        per_state = {}
        for chunk in src.iter_chunks():
            state = src.segments[chunk.segment_index].state
            per_state.setdefault(state, []).append(spec.evaluate(chunk.trajectory))
        lo, hi = spec.observed_range
        tol = 1e-5 * (hi - lo)  # the pipeline's features come from mdtraj in single precision
        for state, values in per_state.items():
            values = np.concatenate(values)
            st = spec.states[state]
            assert st["n_frames"] == values.size
            assert st["min"] == pytest.approx(values.min(), abs=tol)
            assert st["max"] == pytest.approx(values.max(), abs=tol)
        every = np.concatenate([v for vs in per_state.values() for v in vs])
        assert (lo, hi) == pytest.approx((every.min(), every.max()), abs=tol)
        r_lo, r_hi = spec.reachable_range
        assert r_lo is None or r_lo <= lo + tol
        assert r_hi is None or hi <= r_hi + tol


def test_a_folded_coordinate_is_flagged_in_the_spec_and_in_the_summary(demo_run):
    # The demo's states lie near 0 and pi of the latch dihedral: the rank-1 CV, its cos and
    # sin, puts each state at one end of its range (cos is extreme at 0 and pi).
    _, result, out = demo_run
    rank1 = json.loads((out / "cv-01.json").read_text())
    assert {t["transform"] for t in rank1["terms"]} == {"cos", "sin"}
    assert len({t["descriptor"] for t in rank1["terms"]}) == 1
    assert {name: st.get("at_bound") for name, st in rank1["states"].items()} == \
        {"closed": "lower", "open": "upper"}
    assert "a folded coordinate" in rank1["caution"]
    assert "raises its Fisher ratio (held-out J) above that of a CV without a fold" in \
        rank1["caution"]
    summary = (out / "summary.md").read_text()
    assert "| 1 | cv-01.json | [" in summary and "`closed` (lower), `open` (upper) |" in summary
    assert "**Warning** (rank 1, cv-01.json): states 'closed' at the lower bound" in summary
    distance = next(json.loads((out / f"{d['name']}.json").read_text()) for d in result.specs
                    if {t["transform"] for t in d["terms"]} == {"identity"})
    assert distance["reachable_range"]["upper"] is None
    assert not any("at_bound" in st for st in distance["states"].values())
    assert "folded" not in distance["caution"]


def test_hints_grid_covers_the_reachable_range_of_a_bounded_cv(demo_run, capsys):
    _, result, out = demo_run
    spec = load_spec(out / "cv-01.json")
    low, high = spec.reachable_range
    for h in (spec.hints, spec_hints(spec, temperature=300.0, md_step_fs=2.0, barrier=35.0)):
        grid = h["grid"]
        assert grid["lower"] <= low and grid["upper"] >= high and grid["covers_reachable"]
        assert grid["n_bins"] * grid["spacing"] == pytest.approx(grid["upper"] - grid["lower"])
        # both states sit at an end: a wall there would stand beyond what the CV can reach
        assert h["walls"] == {"lower": None, "upper": None, "k_std": 3.0}
    assert "walls            none needed" in format_hints(spec.hints)
    assert main(["hints", str(out / "cv-01.json"), "--temperature", "300",
                 "--md-step-fs", "2"]) == 0
    text = capsys.readouterr().out
    assert f"CV range         reachable [{low:.4g}, {high:.4g}], observed [" in text
    assert "; spans every value the CV can reach" in text


# ------------------------------------------------------------- the ranking's columns
def test_ranking_csv_and_json_hold_the_ranges_and_the_folded_flag(demo_run):
    # ranking.csv: reachable_lower/upper (empty where unbounded), observed_lower/upper,
    # folded (1/0) and states_at_bound; ranking.json the spec's own keys
    _, result, out = demo_run
    rows = {r["spec"]: r for r in csv.DictReader(io.StringIO((out / "ranking.csv").read_text()))}
    ranking = json.loads((out / "ranking.json").read_text())["ranking"]
    assert len(rows) == len(ranking) == len(result.specs) == 3
    kinds = set()
    for entry in ranking:
        row, spec = rows[entry["spec"]], load_spec(out / entry["spec"])
        reach, seen = spec.reachable_range, spec.observed_range
        assert entry["reachable_range"] == {"lower": reach[0], "upper": reach[1]}
        assert entry["observed_range"] == {"lower": seen[0], "upper": seen[1]}
        for side, value in zip(("lower", "upper"), reach):
            assert row[f"reachable_{side}"] == ("" if value is None else f"{value:.6g}")
        assert (row["observed_lower"], row["observed_upper"]) == (f"{seen[0]:.6g}",
                                                                  f"{seen[1]:.6g}")
        at = spec.states_at_bound
        assert {n: st.get("at_bound") for n, st in entry["states"].items() if
                st.get("at_bound")} == at
        assert row["folded"] == ("1" if at else "0")
        assert row["states_at_bound"] == "; ".join(f"{n}:{side}" for n, side in at.items())
        transforms = {t["transform"] for t in entry["terms"]}
        if transforms == {"cos", "sin"}:  # the latch torsion: bounded, folded at both ends
            kinds.add("folded")
            assert None not in reach and row["folded"] == "1"
            assert row["states_at_bound"] == "closed:lower; open:upper"
        elif transforms == {"identity"}:  # distances: no largest value, nothing folded
            kinds.add("linear")
            assert row["reachable_upper"] == "" and row["reachable_lower"] != ""
            assert row["folded"] == "0" and row["states_at_bound"] == ""
    assert kinds == {"folded", "linear"}
    # the DataFrame: an unbounded side is NaN, the flag a boolean
    pd = pytest.importorskip("pandas")
    frame = result.to_frames().ranking.set_index("spec")
    assert math.isnan(frame.loc[next(s for s, r in rows.items() if r["reachable_upper"] == ""),
                                "reachable_upper"])
    assert frame["folded"].dtype == pd.BooleanDtype()
    assert frame.loc["cv-01.json", "folded"] and frame.loc["cv-01.json", "states_at_bound"] \
        == "closed:lower; open:upper"


def test_a_spec_written_without_ranges_gets_its_states_at_bound_from_range_and_states(demo_run):
    _, _, out = demo_run
    doc = json.loads((out / "cv-01.json").read_text())
    stored = load_spec(out / "cv-01.json").states_at_bound
    assert stored == {"closed": "lower", "open": "upper"}
    for key in ("reachable_range", "observed_range"):
        del doc[key]
    for st in doc["states"].values():
        for key in ("min", "max", "at_bound"):
            st.pop(key, None)
    old = Spec.from_dict(doc)
    assert old.states_at_bound == stored and old.observed_range is None
    # computed, not a constant: with spreads a hundredth as wide no state is within
    # FOLD_SPREADS of them of its end
    for st in doc["states"].values():
        st["std"] /= 100.0
    assert Spec.from_dict(doc).states_at_bound == {}


def test_the_fold_raises_the_fisher_ratio_as_the_warning_says(demo_run):
    """The claim of the folded warning, checked on the demo frames with mdtraj's dihedral
    (an outside reference): the rank-1 CV (cos and sin of the latch dihedral) separates the
    states with a Fisher ratio many times that of the same dihedral as a periodic CV
    (circular means, wrapped deviations), though both order the frames alike: 1183 against
    62 when this test was written (2026-12-03)."""
    from cvdesign.pipeline.refine import fisher_separation

    src, _, out = demo_run
    spec = load_spec(out / "cv-01.json")
    (desc,) = spec.descriptors
    values, phis, labels = [], [], []
    for seg in src.segments:
        traj = md.load(seg.path, top=src.topology_path)[seg.start:seg.stop]
        values.append(spec.evaluate(traj.xyz))
        phis.append(md.compute_dihedrals(traj, [desc["atoms"]])[:, 0])
        labels += [seg.state] * traj.n_frames
    values, phis = np.concatenate(values), np.concatenate(phis)
    folded = fisher_separation(values, labels, ("closed", "open"))
    periodic = fisher_separation(phis, labels, ("closed", "open"), period=2 * np.pi)
    assert folded > 5 * periodic > 0
