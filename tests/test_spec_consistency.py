"""A spec's numbers in CV units against its terms and each other: the digest of the CV its
states were computed for (stale states refused by what reads them), terms whose
coefficients overflow, states and ranges that contradict each other, repeated terms, and
the messages of these refusals."""

import copy
import json
import re

import mdtraj as md
import numpy as np
import pytest

from cvdesign.bias.hints import spec_hints
from cvdesign.cli import main
from cvdesign.errors import InputError, SpecError
from cvdesign.pipeline.output import dumps
from cvdesign.spec import Spec, cv_digest, load_spec


def _topology():
    top = md.Topology()
    chain = top.add_chain()
    for r in range(2):
        residue = top.add_residue("ALA", chain, resSeq=r + 1)
        for name, symbol in [("N", "N"), ("CA", "C"), ("C", "C"), ("O", "O")]:
            top.add_atom(name, md.element.get_by_symbol(symbol), residue)
    return top


TOP = _topology()
STATES = {"closed": {"mean": -1.0, "std": 0.2, "n_frames": 100, "min": -1.6, "max": -0.4},
          "open": {"mean": 1.0, "std": 0.3, "n_frames": 100, "min": 0.2, "max": 1.9}}


def _distance_spec(**overrides):
    """CV = (d - 0.5) / 0.1 of the distance between atoms 1 and 5 (reachable [-5, +inf])."""
    parts = dict(name="cv-01", topology=TOP,
                 descriptors=[{"id": "d", "kind": "distance", "atoms": [1, 5]}],
                 terms=[{"descriptor": "d", "transform": "identity", "center": 0.5,
                         "scale": 0.1, "weight": 1.0}],
                 states=copy.deepcopy(STATES), observed_range=(-1.6, 1.9),
                 scores={"integrated_time_ps": 0.5, "frame_spacing_ps": 0.1,
                         "integrated_time_decayed": 1})
    parts.update(overrides)
    return Spec(**parts)


def _cos_sin_spec(**overrides):
    """CV = 0.6 cos(phi) + 0.8 sin(phi) (reachable [-1, 1])."""
    parts = dict(name="cv-02", topology=TOP,
                 descriptors=[{"id": "phi", "kind": "dihedral", "atoms": [0, 1, 2, 4]}],
                 terms=[{"descriptor": "phi", "transform": t, "center": 0.0, "scale": 1.0,
                         "weight": w} for t, w in (("cos", 0.6), ("sin", 0.8))],
                 states={"a": {"mean": -0.5, "std": 0.1, "n_frames": 10},
                         "b": {"mean": 0.5, "std": 0.1, "n_frames": 10}})
    parts.update(overrides)
    return Spec(**parts)


def _save(tmp_path, doc, name="cv.json"):
    path = tmp_path / name
    path.write_text(json.dumps(doc, indent=2))
    return path


def _two_frames():
    rng = np.random.default_rng(3)
    return rng.normal(scale=0.3, size=(2, TOP.n_atoms, 3))


# --------------------------------------------------------------------------
# item: the digest of the CV the states were computed for


def test_the_constructor_stores_the_digest_of_the_cv_its_states_are_for():
    doc = _distance_spec().to_dict()
    assert doc["cv_digest"] == cv_digest(doc) and doc["cv_digest"].startswith("sha256:")
    assert "cv_digest" not in _distance_spec(states={}, observed_range=None).to_dict()


def test_the_digest_ignores_names_and_the_spelling_of_numbers_but_sees_every_number():
    doc = _distance_spec().to_dict()
    same = copy.deepcopy(doc)
    same["descriptors"][0].update(label="renamed", atom_identities=list(reversed(
        same["descriptors"][0]["atom_identities"])))
    same["terms"][0]["weight"] = 1  # an integer: the same number
    assert cv_digest(same) == cv_digest(doc)
    for key, value in (("weight", 10.0), ("center", 0.6), ("scale", 0.2)):
        edited = copy.deepcopy(doc)
        edited["terms"][0][key] = value
        assert cv_digest(edited) != cv_digest(doc), key
    edited = copy.deepcopy(doc)
    edited["descriptors"][0]["atoms"] = [1, 6]
    assert cv_digest(edited) != cv_digest(doc)
    assert cv_digest({**doc, "offset": 1.0}) != cv_digest(doc)


def test_a_file_written_with_numbers_to_12_digits_keeps_its_states_fresh(tmp_path):
    # the pipeline writes numbers to 12 significant digits (pipeline.output.dumps)
    doc = _distance_spec(terms=[{"descriptor": "d", "transform": "identity",
                                 "center": 0.1 + 0.2, "scale": 1 / 3, "weight": 2 / 3}],
                         states={}, observed_range=None).to_dict()
    doc["states"] = {"a": {"mean": 1.0, "std": 0.1, "n_frames": 10}}
    doc["cv_digest"] = cv_digest(doc)
    path = tmp_path / "cv.json"
    path.write_text(dumps(doc))
    assert json.loads(path.read_text())["terms"][0]["scale"] != 1 / 3  # rounded
    spec = load_spec(path)
    assert not spec.states_stale and spec.states["a"]["mean"] == 1.0


def test_an_edited_weight_makes_the_states_stale_and_hints_refuse_naming_the_file(tmp_path):
    # the review's case: weight x10, reachable_range removed as its message advised
    doc = _distance_spec().to_dict()
    doc["terms"][0]["weight"] = 10.0
    del doc["reachable_range"]
    path = _save(tmp_path, doc)
    spec = load_spec(path)  # the CV itself still loads and evaluates
    assert spec.states_stale
    assert np.all(np.isfinite(spec.evaluate(_two_frames())))
    stale = (r"^\$\.cv_digest: spec file '.*cv\.json': its states and observed_range \(read "
             r"here: {}\) are in the units of the CV they were computed for, and the CV was "
             r"edited since .* Recompute them from the trajectories \(run 'cvdesign suggest' "
             r"again")
    with pytest.raises(SpecError, match=stale.format("states")):
        spec_hints(spec, temperature=300.0, md_step_fs=2.0)
    with pytest.raises(SpecError, match=stale.format("observed_range")):
        spec.observed_range  # noqa: B018
    with pytest.raises(SpecError, match=stale.format("states_at_bound")):
        spec.states_at_bound  # noqa: B018


def test_check_refuses_a_spec_with_stale_states_before_reporting_ranges(tmp_path, capsys):
    doc = _distance_spec().to_dict()
    doc["terms"][0]["center"] = 0.9
    del doc["reachable_range"]
    path = _save(tmp_path, doc)
    top = tmp_path / "top.pdb"
    md.Trajectory(_two_frames()[:1].astype(np.float32), TOP).save_pdb(str(top))
    before = sorted(p.name for p in tmp_path.iterdir())
    assert main(["check", str(path), "--topology", str(top)]) == 2
    out, err = capsys.readouterr()
    assert out == ""
    assert "error: $.cv_digest: spec file" in err and "(read here: observed_range)" in err
    assert sorted(p.name for p in tmp_path.iterdir()) == before


def test_removing_the_stale_numbers_keeps_the_cv_usable(tmp_path):
    doc = _distance_spec().to_dict()
    doc["terms"][0]["weight"] = 10.0
    for key in ("reachable_range", "observed_range", "hints", "cv_digest"):
        doc.pop(key, None)
    doc["states"] = {}
    spec = load_spec(_save(tmp_path, doc))
    assert not spec.states_stale and spec.states == {} and spec.observed_range is None
    with pytest.raises(InputError, match=r"records no states"):
        spec_hints(spec, temperature=300.0, md_step_fs=2.0)


def test_a_spec_without_digest_loads_and_is_not_marked_stale():
    doc = _distance_spec().to_dict()
    del doc["cv_digest"]
    doc["terms"][0]["weight"] = 1.5  # cannot be told from the states
    del doc["reachable_range"]
    spec = Spec.from_dict(doc)
    assert not spec.states_stale and spec.states["open"]["mean"] == 1.0
    assert "cv_digest" not in spec.to_dict()  # loading does not add one


def test_an_edited_term_of_a_spec_with_a_digest_loads_as_stale_and_still_evaluates():
    """The documented path: after an edit of the terms the CV itself still loads, evaluates
    and exports (its reachable range computed from the new terms), while the states, the
    observed range and the hints, of the old CV, are refused when read."""
    doc = _distance_spec().to_dict()
    doc["hints"] = {"caution": "sized from the old states"}
    doc["terms"][0]["weight"] = 10.0
    spec = Spec.from_dict(doc)
    assert spec.states_stale
    assert spec.reachable_range == (-50.0, None)  # 10 (d - 0.5) / 0.1 for d >= 0
    xyz = np.zeros((1, TOP.n_atoms, 3))
    xyz[0, 5, 0] = 0.7
    np.testing.assert_allclose(spec.evaluate(xyz), [20.0], rtol=1e-6)
    for read in ("states", "observed_range", "states_at_bound", "hints"):
        with pytest.raises(SpecError, match=rf"read here: {read}\)"):
            getattr(spec, read)


def test_the_range_message_no_longer_advises_an_edit_that_leaves_stale_states():
    doc = _distance_spec().to_dict()
    del doc["cv_digest"]  # (a spec written before the digest: the range tells the edit)
    doc["terms"][0]["weight"] = 10.0
    with pytest.raises(SpecError, match=r"^\$\.reachable_range\.lower: .* The terms or the range "
                       r"were edited: recompute the range\. The states and observed_range are "
                       r"in the CV's units too: .*or remove reachable_range, observed_range, "
                       r"hints and the states' entries"):
        Spec.from_dict(doc)
    no_states = _distance_spec(states={}, observed_range=None).to_dict()
    no_states["terms"][0]["weight"] = 10.0
    with pytest.raises(SpecError, match=r"recompute the range, or remove reachable_range$"):
        Spec.from_dict(no_states)


# --------------------------------------------------------------------------
# item: finite numbers whose quotients overflow


@pytest.mark.parametrize(("term", "path", "what"), [
    ({"scale": 1e-320}, r"\.scale", "weight / scale"),
    ({"scale": 1e-300, "weight": 1e300}, r"\.scale", "weight / scale"),
    ({"scale": 2.0, "weight": 1e308, "center": 1e10}, r"\.weight", r"weight \* center / scale"),
])
def test_a_term_whose_coefficient_overflows_is_refused(term, path, what):
    doc = _distance_spec(states={}, observed_range=None).to_dict()
    doc["terms"][0].update(term)
    del doc["reachable_range"]
    with pytest.raises(SpecError, match=rf"^\$\.terms\[0\]{path}: {what} is not a finite number"):
        Spec.from_dict(doc)


def test_the_evaluator_refuses_a_cv_that_overflows_on_finite_coordinates():
    spec = _distance_spec(states={}, observed_range=None,
                          terms=[{"descriptor": "d", "transform": "identity", "center": 0.0,
                                  "scale": 1e-8, "weight": 1e300}])
    xyz = np.zeros((3, TOP.n_atoms, 3))
    xyz[:, 5, 0] = [0.1, 0.5, 1e3]  # the last frame's 1e3 nm times 1e308 overflows
    with pytest.raises(SpecError, match=r"^\$\.terms: the CV is inf at frame 2 of finite "
                       r"coordinates: spec 'cv-01' has terms whose coefficients"):
        spec.evaluate(xyz)
    with pytest.raises(SpecError, match=r"at frame 2 of finite coordinates"):
        spec.evaluate(xyz, gradient=True)
    assert np.all(np.isfinite(spec.evaluate(xyz[:2])))


def test_the_evaluator_refuses_coordinates_that_are_not_finite():
    xyz = _two_frames()
    xyz[1, 5, 2] = np.nan
    with pytest.raises(InputError, match=r"xyz has NaN or infinite coordinates in frame 1, "
                       r"atom 5"):
        _distance_spec().evaluate(xyz)


# --------------------------------------------------------------------------
# item: states and ranges against each other


def _edited(edit, base=None):
    doc = (base or _distance_spec)().to_dict()
    edit(doc)
    return doc


@pytest.mark.parametrize(("edit", "base", "message"), [
    (lambda d: d["states"]["closed"].update(mean=-9.0, min=-9.5), None,
     r"^\$\.states\.closed\.mean: -9\.0 lies outside the values the CV can reach \[-5\.0, null "
     r"\(unbounded\)\]"),
    (lambda d: d["states"]["a"].update(mean=-1.5), _cos_sin_spec,
     r"^\$\.states\.a\.mean: -1\.5 lies outside the values the CV can reach \[-1\.0, 1\.0\]"),
    (lambda d: d["observed_range"].update(lower=-50.0), None,
     r"^\$\.observed_range\.lower: -50\.0 lies beyond the lower end -5\.0 of the values the CV "
     r"can reach"),
    (lambda d: d["states"]["open"].update(min=1.2), None,
     r"^\$\.states\.open\.min: 1\.2 is on the wrong side of the state's mean 1\.0 \(min <= mean "
     r"<= max\)"),
    (lambda d: d["states"]["open"].update(max=0.8), None,
     r"^\$\.states\.open\.max: 0\.8 is on the wrong side of the state's mean 1\.0"),
    (lambda d: d["states"]["open"].update(at_bound="lower"), None,
     r"^\$\.states\.open\.at_bound: says the state sits at the lower bound of the reachable "
     r"range, but its mean 1\.0 and std 0\.3 put it at no bound"),
    (lambda d: d["states"]["a"].update(mean=-0.95, at_bound="upper"), _cos_sin_spec,
     r"^\$\.states\.a\.at_bound: says the state sits at the upper bound .* put it at the lower "
     r"bound"),
])
def test_states_and_ranges_that_contradict_each_other_are_refused(edit, base, message):
    with pytest.raises(SpecError, match=message):
        Spec.from_dict(_edited(edit, base))


def test_stored_values_past_a_reachable_end_by_float32_rounding_are_accepted():
    # the observed extremes come from float32 features (rounding about 1e-7 relative)
    doc = _cos_sin_spec().to_dict()
    doc["states"]["a"].update(mean=-1.0 - 3e-8, std=0.01)
    doc["states"]["a"]["at_bound"] = "lower"
    doc["observed_range"] = {"lower": -1.0 - 3e-8, "upper": 1.0 + 3e-8}
    spec = Spec.from_dict(doc)
    assert spec.states_at_bound == {"a": "lower"}
    doc["observed_range"]["upper"] = 1.0 + 1e-3
    with pytest.raises(SpecError, match=r"^\$\.observed_range\.upper: 1\.001 lies beyond"):
        Spec.from_dict(doc)


def test_a_missing_at_bound_flag_is_recomputed_as_the_hints_do():
    doc = _cos_sin_spec().to_dict()
    doc["states"]["a"].update(mean=-0.95)  # within 2 std of -1
    spec = Spec.from_dict(doc)
    assert "at_bound" not in spec.states["a"]
    assert spec.states_at_bound == {"a": "lower"}


def test_a_periodic_cv_takes_no_at_bound_flag():
    spec = Spec(name="p", topology=TOP,
                descriptors=[{"id": "psi", "kind": "dihedral", "atoms": [0, 1, 2, 4]}],
                terms=[{"descriptor": "psi", "transform": "identity", "center": 0.0,
                        "scale": 1.0, "weight": 1.0}], periodic=True,
                states={"a": {"mean": 3.1, "std": 0.1, "n_frames": 10}})
    assert spec.states_at_bound == {}
    doc = spec.to_dict()
    doc["states"]["a"]["at_bound"] = "upper"
    with pytest.raises(SpecError, match=r"^\$\.states\.a\.at_bound: a periodic CV has no bound"):
        Spec.from_dict(doc)


def test_stale_states_are_not_compared_with_the_new_range():
    # refused for being stale when read, not for the range they no longer fit
    doc = _distance_spec().to_dict()
    doc["terms"][0]["weight"] = -10.0
    del doc["reachable_range"]
    spec = Spec.from_dict(doc)  # means now above the reachable upper end 50: not checked
    assert spec.states_stale


# --------------------------------------------------------------------------
# item: repeated terms and identical groups


def test_a_repeated_descriptor_and_transform_is_refused_naming_both_terms():
    doc = _cos_sin_spec(states={}).to_dict()
    doc["terms"].append(copy.deepcopy(doc["terms"][0]))
    del doc["reachable_range"]
    with pytest.raises(SpecError, match=r"^\$\.terms\[2\]: repeats the cos term of descriptor "
                       r"'phi' \(first at \$\.terms\[0\]\), which would count it twice"):
        Spec.from_dict(doc)


@pytest.mark.parametrize("second", [[4, 5, 6], [6, 4, 5]])
def test_a_center_distance_between_the_same_atoms_is_refused(second):
    with pytest.raises(SpecError, match=r"^\$\.descriptors\[0\]\.groups: the two groups hold the "
                       r"same atoms, so their centres coincide"):
        Spec(name="c", topology=TOP,
             descriptors=[{"id": "c", "kind": "center_distance", "groups": [[4, 5, 6], second],
                           "weighting": "geometric"}],
             terms=[{"descriptor": "c", "transform": "identity", "center": 0.0, "scale": 1.0,
                     "weight": 1.0}])


# --------------------------------------------------------------------------
# item: messages


@pytest.mark.parametrize(("key", "value"), [("integrated_time_ps", -1.0),
                                            ("frame_spacing_ps", 0.0),
                                            ("integrated_time_ps", [1.0, 2.0])])
def test_hints_name_the_spec_key_and_file_of_a_bad_time(tmp_path, key, value):
    doc = _distance_spec().to_dict()
    doc["scores"][key] = value
    spec = load_spec(_save(tmp_path, doc))
    with pytest.raises(InputError, match=rf"^\$\.scores\.{key} of spec file '.*cv\.json' is "
                       rf"{re.escape(repr(value))}: it must be a positive number of ps"):
        spec_hints(spec, temperature=300.0, md_step_fs=2.0)


@pytest.mark.parametrize("value", [7, 0.5, -1])
def test_integrated_time_decayed_must_be_1_or_0(value):
    doc = _distance_spec().to_dict()
    doc["scores"]["integrated_time_decayed"] = value
    with pytest.raises(SpecError, match=r"^\$\.scores\.integrated_time_decayed: must be 1 or 0"):
        Spec.from_dict(doc)
    doc["scores"]["integrated_time_decayed"] = 0
    assert Spec.from_dict(doc).scores["integrated_time_decayed"] == 0


def test_an_empty_state_name_is_named_as_such():
    doc = _distance_spec(states={}, observed_range=None).to_dict()
    doc["states"] = {"": {"mean": 0.0, "std": 1.0, "n_frames": 1}}
    with pytest.raises(SpecError, match=r'^\$\.states: a name in this object must not be empty '
                       r'\(got the key ""\)'):
        Spec.from_dict(doc)

