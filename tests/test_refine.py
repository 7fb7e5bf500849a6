"""Refinement from a biased run: basin labels, crossings, effective sample sizes, and the
comparison of two CVs (cvdesign.pipeline.refine)."""

import math
import re
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest

from cvdesign.constants import BOLTZMANN_KJ_MOL_K
from cvdesign.errors import InputError
from cvdesign.io.source import Source
from cvdesign.stats.separation import fisher_ratio
from cvdesign.pipeline.refine import (basins_from_spec, compare_specs, fisher_separation,
                                      label_basins)
from cvdesign.spec import Spec
from cvdesign.testbed import two_wells

CORES = {"a": (-1.5, -0.5), "b": (0.5, 1.5)}


def _hand_made_series(rng, visits, dwell=20, gap=5):
    """A series visiting the cores in `visits` order with noisy gaps between them, and
    the number of core changes it makes by construction."""
    centre = {"a": -1.0, "b": 1.0}
    parts, expected = [], []
    for i, state in enumerate(visits):
        parts.append(centre[state] + rng.uniform(-0.4, 0.4, dwell))
        expected += [state] * dwell
        parts.append(rng.uniform(-0.45, 0.45, gap))  # between the cores
        expected += [None] * gap
    changes = sum(1 for x, y in zip(visits, visits[1:]) if x != y)
    return np.concatenate(parts), expected, changes


def test_label_basins_counts_the_crossings_of_hand_made_series():
    rng = np.random.default_rng(3)
    for visits in (["a", "b", "a", "a", "b"], ["b", "b", "b"], ["a", "b"] * 7):
        x, expected, changes = _hand_made_series(rng, visits)
        res = label_basins(x, CORES, timestep_ps=0.1)
        assert res.labels.tolist() == expected
        assert res.crossings == changes
        assert res.transition_frames == expected.count(None)
        assert res.frames == {s: expected.count(s) for s in "ab"}
        assert res.ess == {s: float(expected.count(s)) for s in "ab"}  # no bias: all frames
        assert math.isclose(res.crossings_per_ns, changes / (x.size * 0.1 / 1000))
        # each crossing is marked at the first frame of the dwell in the new core
        starts = [i * 25 for i in range(1, len(visits)) if visits[i] != visits[i - 1]]
        assert res.crossing_frames.tolist() == starts


def test_a_recrossing_into_the_same_core_is_not_a_crossing():
    x = [-1.0, -0.2, 0.3, -0.1, -1.1, 0.0, 1.0, 0.2, 1.2]
    res = label_basins(x, CORES)
    assert res.crossings == 1 and res.crossing_frames.tolist() == [6]


def test_periodic_cores_wrap_around_the_circle():
    # a core across +-pi (the open state of a torsion) and one about 0
    cores = {"open": (2.5, 2.5 + 1.2833), "closed": (-0.6, 0.6)}
    phi = [3.1, -3.1, 0.1, 1.5, -2.9, -0.3]
    res = label_basins(phi, cores, period=2 * np.pi)
    assert res.labels.tolist() == ["open", "open", "closed", None, "open", "closed"]
    assert res.crossings == 3


def test_ess_follows_the_bias_weights():
    """Kish's (sum w)^2 / sum w^2 (Kish, Survey Sampling, Wiley, 1965) of exp(V/kT)."""
    kt = BOLTZMANN_KJ_MOL_K * 300.0
    x = [-1.0, -1.0, -1.0, 1.0, 1.0]
    v = kt * np.log([1.0, 1.0, 2.0, 1.0, 1.0])
    res = label_basins(x, CORES, bias=v, temperature=300.0)
    assert res.ess["a"] == pytest.approx(16 / 6)
    assert res.ess["b"] == pytest.approx(2.0)


def test_labels_go_to_a_biased_source(tmp_path):
    """The labels and a bias-energy file make a labelled biased run of a Source."""
    import mdtraj as md
    system = two_wells()
    rng = np.random.default_rng(0)
    xyz = np.stack([system.states["slowA"]] * 3 + [system.states["slowB"]] * 3)
    xyz = xyz + rng.normal(0, 0.002, xyz.shape)
    path = tmp_path / "run.xtc"
    md.Trajectory(xyz.astype(np.float32), system.topology).save_xtc(str(path))
    (tmp_path / "run-bias.txt").write_text("bias\n" + "1.0\n" * 6, encoding="utf-8")
    phi = system.slow_angle(xyz)
    res = label_basins(phi, {"slowA": (-0.5, 0.5), "slowB": (np.pi - 0.5, np.pi + 0.5)},
                       period=2 * np.pi)
    src = Source(system.topology, temperature=300.0)
    src.add_labelled(path, res.labels, bias=tmp_path / "run-bias.txt")
    assert src.states == ["slowA", "slowB"] and res.crossings == 1


def _spec(terms, states=None, periodic=False):
    system = two_wells()
    return Spec(name="cv", topology=system.topology,
                descriptors=[{"id": i, "kind": k, "atoms": a, "label": f"{k} {i}"}
                             for i, k, a, *_ in terms],
                terms=[{"descriptor": i, "transform": t, "center": 0.0, "scale": s,
                        "weight": w} for i, _, _, t, s, w in terms],
                states=states or {}, periodic=periodic)


def test_basins_from_spec_uses_means_and_spreads():
    spec = _spec([("d", "distance", [0, 3], "identity", 1.0, 1.0)],
                 states={"slowA": {"mean": 0.27, "std": 0.01, "n_frames": 10},
                         "slowB": {"mean": 0.39, "std": 0.02, "n_frames": 10}})
    assert basins_from_spec(spec, core=2.0) == {"slowA": (0.25, 0.29), "slowB": (0.35, 0.43)}
    # the means are 0.12 apart and the spreads add up to 0.03: the cores touch at core=4
    with pytest.raises(InputError, match=r"the basin cores 'slowA' and 'slowB' overlap \(means "
                       r"0\.12 apart, spreads 0\.01 and 0\.02\) at core=4\.5: give a smaller "
                       r"core=, e.g\. core=3\.6 \(they touch at core=4\)"):
        basins_from_spec(spec, core=4.5)
    assert basins_from_spec(spec, core=3.6) == {"slowA": (0.234, 0.306),
                                                "slowB": (0.318, 0.462)}


def test_basins_from_spec_suggests_a_core_that_works_across_the_period():
    """A periodic CV with states on either side of the cut: the suggested core is below the
    one at which the cores touch the short way round the circle."""
    spec = SimpleNamespace(states={"a": {"mean": 3.0, "std": 0.1},
                                   "b": {"mean": -2.9, "std": 0.2},
                                   "c": {"mean": 0.0, "std": 0.5}},
                           periodic=True, period=2 * np.pi)
    gap = 2 * np.pi - 5.9  # a and b, across +-pi
    touch = re.escape(f"{gap / 0.3:g}")  # 1.27728: 0.9 of it rounds down to 1.1
    with pytest.raises(InputError, match=r"'a' and 'b' overlap .* at core=2: give a smaller "
                       rf"core=, e.g\. core=1\.1 \(they touch at core={touch}\)"):
        basins_from_spec(spec, core=2.0)
    cores = basins_from_spec(spec, core=1.1)
    assert label_basins([3.1, -3.1, 0.0, 1.0], cores, period=2 * np.pi).labels.tolist() == [
        "a", "b", "c", None]
    # the cores carry the spec's period: without period= they wrap the same (a core at pi
    # missed its frames beyond the cut without a word)
    assert cores.period == 2 * np.pi
    assert label_basins([3.1, -3.1, 0.0, 1.0], cores).labels.tolist() == ["a", "b", "c", None]
    with pytest.raises(InputError, match=r"period=3\.0 but the basin cores come from a spec "
                                         r"of period 6\.28"):
        label_basins([3.1], cores, period=3.0)


def test_basins_from_spec_refuses_a_spec_of_one_state_saying_what_to_do():
    one = SimpleNamespace(states={"bound": {"mean": 1.0, "std": 0.1}})
    with pytest.raises(InputError, match=r"^the spec has one state, 'bound': basin cores need "
                       r"two or more states; give the cores yourself, label_basins\(values, "
                       r"\{state: \(lo, hi\), \.\.\.\}\) with a core for each basin"):
        basins_from_spec(one)
    with pytest.raises(InputError, match=r"^the spec has no state: basin cores need two"):
        basins_from_spec(SimpleNamespace(states={}))
    same = SimpleNamespace(states={"a": {"mean": 1.0, "std": 0.1}, "b": {"mean": 1.0,
                                                                        "std": 0.2}})
    with pytest.raises(InputError, match=r"'a' and 'b' overlap \(means 0 apart.*\): this CV "
                       r"does not separate them"):
        basins_from_spec(same)


@pytest.mark.parametrize("call, message", [
    (lambda: basins_from_spec(SimpleNamespace(states={}), core="x"),
     r"^core='x': give a positive number of spreads, e\.g\. core=1\.0$"),
    (lambda: basins_from_spec(SimpleNamespace(states={}), core=None),
     r"^core=None: give a positive number"),
    (lambda: label_basins([0.0], CORES, bias=[0.0], temperature="x"),
     r"^temperature='x': a bias needs the positive temperature of the run, K"),
    (lambda: label_basins([0.0], CORES, timestep_ps="x"),
     r"^timestep_ps='x': give the time between frames as a positive number of ps"),
    (lambda: label_basins([0.0], CORES, period="x"),
     r"^period='x': give the period as a positive length"),
    (lambda: fisher_separation([0, 1, 5, 6, 10, 11], list("aabbcc"), ("a", "b", "c")),
     r"states=\('a', 'b', 'c'\) must name two different states .* got 3: call "
     r"fisher_separation once per pair"),
    (lambda: fisher_separation([0, 1, 5, 6], list("aabb"), "ab"),
     r"states='ab' must name two different states .* got 1$"),
    (lambda: fisher_separation([0, 1, 5, 6], list("aabb"), ("a", "a")),
     r"states=\('a', 'a'\) must name two different states"),
], ids=["core-text", "core-none", "temperature-text", "timestep-text", "period-text",
        "fisher-three-states", "fisher-one-string", "fisher-same-state"])
def test_arguments_that_are_not_numbers_or_pairs_are_refused_by_name(call, message):
    with pytest.raises(InputError, match=message):
        call()


def test_compare_specs_matches_terms_by_atoms_and_standardizes_weights():
    one = _spec([("x", "distance", [0, 3], "identity", 0.5, 1.0),
                 ("y", "distance", [1, 4], "identity", 1.0, 1.0)])
    # the same two distances under other ids and scales, plus a torsion
    two = _spec([("p", "distance", [0, 3], "identity", 1.0, 2.0),
                 ("q", "distance", [1, 4], "identity", 2.0, 2.0),
                 ("t", "dihedral", [0, 1, 2, 3], "cos", 1.0, 0.0)])
    c = compare_specs(one, two)
    assert c.kept == ("identity(distance p)", "identity(distance q)")
    assert c.added == ("cos(dihedral t)",) and c.removed == ()
    # raw coefficients: one (2, 1), two (2, 1) -> same direction
    assert c.cosine == pytest.approx(1.0)
    flipped = _spec([("p", "distance", [0, 3], "identity", 1.0, -1.0),
                     ("q", "distance", [1, 4], "identity", 2.0, 4.0)])
    # one in CV 2's scales: (2*1, 1*2) = (2, 2); flipped: (-1, 4); |cos| = 6 / (sqrt8 sqrt17)
    assert compare_specs(one, flipped).cosine == pytest.approx(6 / math.sqrt(8 * 17))
    other = _spec([("t", "dihedral", [0, 1, 2, 3], "sin", 1.0, 1.0)])
    assert compare_specs(one, other).cosine == 0.0


def test_compare_specs_takes_a_descriptor_written_in_another_order_as_the_same():
    # a distance (0, 5) and (5, 0), a dihedral and its reverse: the same values, reported as
    # added and removed (cosine 0.36 and 0); a coordination with another r0 was 'kept'
    one = _spec([("x", "distance", [0, 3], "identity", 1.0, 1.0),
                 ("t", "dihedral", [0, 1, 2, 3], "cos", 1.0, 1.0)])
    two = _spec([("y", "distance", [3, 0], "identity", 1.0, 1.0),
                 ("u", "dihedral", [3, 2, 1, 0], "cos", 1.0, 1.0)])
    c = compare_specs(one, two)
    assert c.added == c.removed == () and len(c.kept) == 2 and c.cosine == pytest.approx(1.0)
    system = two_wells()

    def coordination(r0):
        return Spec(name="cv", topology=system.topology,
                    descriptors=[{"id": "c", "kind": "coordination", "groups": [[0], [3]],
                                  "r0": r0, "label": f"coordination r0 {r0}"}],
                    terms=[{"descriptor": "c", "transform": "identity", "center": 0.0,
                            "scale": 1.0, "weight": 1.0}], states={})

    c = compare_specs(coordination(0.45), coordination(0.9))
    assert c.kept == () and c.added and c.removed and c.cosine == 0.0
    assert compare_specs(coordination(0.45), coordination(0.45)).kept


def _suggested_documents(tmp_path):
    """Two spec documents (dicts, as ``suggest(...).specs`` holds them) of the two-wells toy:
    a distance, and the same distance with a torsion's cos term."""
    one = _spec([("x", "distance", [0, 3], "identity", 0.5, 1.0)],
                states={"slowA": {"mean": 1.0, "std": 0.2, "n_frames": 10},
                        "slowB": {"mean": 3.0, "std": 0.4, "n_frames": 10}})
    two = _spec([("p", "distance", [0, 3], "identity", 1.0, 2.0),
                 ("t", "dihedral", [0, 1, 2, 3], "cos", 1.0, 1.0)])
    return one, two, one.to_dict(), two.to_dict()


def test_compare_specs_and_basins_from_spec_take_spec_dicts(tmp_path):
    one, two, one_doc, two_doc = _suggested_documents(tmp_path)
    expected = compare_specs(one, two)
    assert expected.kept == ("identity(distance p)",) and expected.added == ("cos(dihedral t)",)
    assert compare_specs(one_doc, two_doc) == expected
    assert compare_specs(one, two_doc) == expected
    assert basins_from_spec(one_doc, core=2.0) == basins_from_spec(one, core=2.0) == {
        "slowA": (0.6, 1.4), "slowB": (2.2, 3.8)}


def test_compare_specs_refuses_what_is_not_a_spec_naming_the_argument(tmp_path):
    one, _, one_doc, two_doc = _suggested_documents(tmp_path)
    del two_doc["terms"]
    with pytest.raises(InputError, match=r"^second: the dict given is not a valid spec \(\$: "
                       r".*'terms'.*\); give a Spec \(load_spec\) or a spec dict"):
        compare_specs(one, two_doc)
    with pytest.raises(InputError, match=r"^first='cv-01\.json' is a path or text, not a spec: "
                       r"read the file with load_spec\(path\) first"):
        compare_specs("cv-01.json", one)
    with pytest.raises(InputError, match=r"^second must be a Spec \(load_spec\) or a spec dict "
                       r"\(an entry of suggest\(\.\.\.\)\.specs\); got a list"):
        compare_specs(one, [one_doc])
    with pytest.raises(InputError, match=r"^spec must be a Spec .* got a NoneType"):
        basins_from_spec(None)


def test_fisher_separation_weighs_frames_and_wraps_periodic_values():
    x = [0.0, 2.0, 4.0, 6.0]
    labels = ["a", "a", "b", "b"]
    assert fisher_separation(x, labels, ("a", "b")) == pytest.approx(4.0)
    # the ranking's Fisher ratio (between over within, equal state weights): it was twice it
    assert fisher_separation(x, labels, ("a", "b")) == pytest.approx(
        float(fisher_ratio([[1.0], [5.0]], [[1.0], [1.0]])[0]))
    # integer weights equal repeated frames
    assert fisher_separation(x, labels, ("a", "b"), weights=[2, 1, 1, 1]) == pytest.approx(
        fisher_separation([0.0, 0.0, 2.0, 4.0, 6.0], ["a"] * 3 + ["b"] * 2, ("a", "b")))
    # across the cut at +-pi the circular means are pi and 0
    phi = [3.0, -3.0, 0.1, -0.1]
    j = fisher_separation(phi, labels, ("a", "b"), period=2 * np.pi)
    d = np.pi - 3.0
    assert j == pytest.approx(0.5 * np.pi ** 2 / (d ** 2 + 0.01))


def test_bad_input_is_refused_with_the_argument_named():
    with pytest.raises(InputError, match="values has a non-finite value at frame 1"):
        label_basins([0.0, np.nan], CORES)
    with pytest.raises(InputError, match="shape \\(n_frames,\\).*each run"):
        label_basins(np.zeros((3, 2)), CORES)
    with pytest.raises(InputError, match="bias has 1 values but values has 2 frames"):
        label_basins([0.0, 1.0], CORES, bias=[0.0], temperature=300.0)
    with pytest.raises(InputError, match="temperature=None: a bias needs"):
        label_basins([0.0, 1.0], CORES, bias=[0.0, 0.0])
    with pytest.raises(InputError, match="at least two state names"):
        label_basins([0.0], {"a": (0, 1)})
    with pytest.raises(InputError, match="basin 'b': core .* needs finite lo < hi"):
        label_basins([0.0], {"a": (0, 1), "b": (3, 2)})
    with pytest.raises(InputError, match="as wide as the period"):
        label_basins([0.0], {"a": (0, 7), "b": (8, 9)}, period=2 * np.pi)


# ---------------------------------------------------------------------------- README example
README = Path(__file__).resolve().parent.parent / "README.md"
BOND_NM, BOND_PER_X = 0.6, 0.15  # the well's x mapped onto a bond of 0.6 + 0.15 x nm


def _readme_refine_block():
    """The code block of README's section 'Refining a CV from a biased run', padded with
    blank lines so that a traceback gives README's own line numbers."""
    text = README.read_text(encoding="utf-8")
    head, section = text.split("## Refining a CV from a biased run", 1)
    before, rest = section.split("```python\n", 1)
    return "\n" * (head + before).count("\n") + "\n" + rest.split("```", 1)[0]


def _write_bond_runs(out, name, runs, top, well=None):
    """XTC files of a two-atom molecule whose bond is 0.6 + 0.15 x nm for the double well's
    x (invented), and with `well` a bias-energy file of each (kJ/mol, the static bias of the
    x the stored bond gives back)."""
    import mdtraj as md
    files = []
    for i, x in enumerate(runs):
        xyz = np.zeros((x.size, 2, 3), dtype=np.float32)
        xyz[:, 1, 0] = BOND_NM + BOND_PER_X * x
        path = out / f"{name}-{i}.xtc"
        md.Trajectory(xyz, top, time=np.arange(x.size) * 0.1).save_xtc(str(path))
        if well is None:
            files.append(str(path))
            continue
        stored = (md.load(str(path), top=top).xyz[:, 1, 0] - BOND_NM) / BOND_PER_X
        bias = out / f"{name}-{i}.bias"
        bias.write_text("bias\n" + "".join(f"{v!r}\n" for v in well.bias(stored).tolist()),
                        encoding="utf-8")
        files.append((str(path), str(bias)))
    return files


def test_the_readme_refinement_example_runs_as_written(tmp_path, monkeypatch, capsys):
    """README's refinement loop, executed as printed, on an invented molecule: the testbed's
    tilted double well (cvdesign.testbed.wells) as a bond length. CV 1 comes from unbiased
    runs that stay in one well each; the walkers are biased runs that cross the barrier."""
    import json

    import mdtraj as md

    from cvdesign import suggest
    from cvdesign.testbed.wells import DoubleWell
    well = DoubleWell()
    top = md.Topology()
    res = top.add_residue("BND", top.add_chain())
    for atom in ("C1", "C2"):
        top.add_atom(atom, md.element.carbon, res)
    md.Trajectory(np.array([[[0, 0, 0], [BOND_NM, 0, 0]]], dtype=np.float32),
                  top).save_pdb(str(tmp_path / "mol.pdb"))
    short = well.run(40, 200, md_step_ps=2e-3, stride=25, biased=False, seed=5)
    basin = {"left": [x for x in short if (x < 0).all()][:3],
             "right": [x for x in short if (x > 0).all()][:3]}
    assert all(len(v) == 3 for v in basin.values())
    src = Source(str(tmp_path / "mol.pdb"))
    for name, runs in basin.items():
        for path in _write_bond_runs(tmp_path, name, runs, top):
            src.add(path, name)
    cv1 = suggest(src, n_bootstrap=0).specs[0]
    (tmp_path / "cv-03.json").write_text(json.dumps(cv1), encoding="utf-8")
    walkers = _write_bond_runs(tmp_path, "walker",
                               well.run(2, 1000, md_step_ps=2e-3, stride=25, biased=True,
                                        seed=6), top, well=well)
    before = sorted(p.name for p in tmp_path.iterdir())
    monkeypatch.chdir(tmp_path)
    capsys.readouterr()
    exec(compile(_readme_refine_block(), str(README), "exec"), {"walkers": walkers})
    out = capsys.readouterr().out.splitlines()
    assert sorted(p.name for p in tmp_path.iterdir()) == before  # the example writes nothing
    # one summary per walker, each with crossings between the wells' cores
    visits = [line for line in out if "transition frames" in line]
    assert len(visits) == 2 and all(int(re.search(r"; (\d+) crossings", v).group(1)) > 0
                                    for v in visits), out
    # the only candidate is the bond: CV 2 keeps it, in the same direction
    assert out[-4:] == ["terms kept: identity(dist BND0:C1-C2)", "terms added: none",
                        "terms removed: none",
                        "|cosine| of the standardized weight vectors: 1.000"], out


def test_fisher_separation_of_two_states_without_spread_is_refused_not_infinite():
    """One frame per state (or a coordinate frozen in both) has no spread: the ratio is
    0/0 or x/0, not a measured separation (it returned inf without a word)."""
    with pytest.raises(InputError, match="states 'a' and 'b' have no spread along the "
                                         "coordinate .* undefined rather than infinite"):
        fisher_separation([0.0, 1.0], ["a", "b"], ("a", "b"))
    # weighted frames of one value each: rounding in the weighted mean left a variance of
    # about 1e-34 and a ratio of 4e32 (review)
    with pytest.raises(InputError, match="have no spread"):
        fisher_separation([0.123456789] * 5 + [0.7] * 5, ["a"] * 5 + ["b"] * 5, ("a", "b"),
                          weights=[0.11, 0.27, 0.33, 0.19, 0.1] + [1.0] * 5)
    # a torsion frozen at the branch cut, stored in single precision: +-3.1415927 wrap to
    # one point up to rounding (it gave 3e15, review)
    with pytest.raises(InputError, match="have no spread"):
        fisher_separation([3.1415927, -3.1415927, 3.1415927, 0.5, 0.5, 0.5],
                          ["a"] * 3 + ["b"] * 3, ("a", "b"), weights=[0.2, 0.5, 0.3, 1, 1, 1],
                          period=2 * math.pi)
    assert fisher_separation([0.0, 0.0, 1.0, 3.0], ["a", "a", "b", "b"], ("a", "b")) == 2.0


def test_label_basins_of_no_frame_is_refused():
    with pytest.raises(InputError, match="values holds no frame"):
        label_basins([], {"a": (0.0, 1.0), "b": (2.0, 3.0)})


def test_fisher_separation_with_a_period_equals_the_plain_ratio_away_from_the_cut():
    # a skewed state far from +-pi: the circular mean's direction is not the values' mean,
    # and the ratio with period= came out 3.94 against 4.29 without (a review)
    rng = np.random.default_rng(6)
    a = -1.0 + rng.gamma(2.0, 0.15, 400)  # skewed
    b = 1.0 + rng.normal(0.0, 0.2, 400)
    x = np.concatenate([a, b])
    labels = ["a"] * 400 + ["b"] * 400
    plain = fisher_separation(x, labels, ("a", "b"))
    assert fisher_separation(x, labels, ("a", "b"), period=2 * np.pi) == pytest.approx(
        plain, rel=1e-9)


@pytest.mark.parametrize("call, message", [
    (lambda: label_basins([0.0], {1: (0.0, 1.0), "1": (2.0, 3.0)}),
     r"basins name state '1' twice"),
    (lambda: label_basins([0.0], {"a": "01", "b": (2.0, 3.0)}),
     r"basin 'a': core '01' must be a pair \(lo, hi\) of numbers"),
    (lambda: fisher_separation([0.0, 1.0], ["a", "b"], None),
     r"states=None must name the two states compared"),
    (lambda: fisher_separation([0.0, 1.0, 2.0, 3.0], [["a", "a"], ["b", "b"]], ("a", "b")),
     r"labels has shape \(2, 2\); give one label per frame"),
])
def test_refinement_inputs_that_were_taken_silently_are_refused(call, message):
    with pytest.raises(InputError, match=message):
        call()
