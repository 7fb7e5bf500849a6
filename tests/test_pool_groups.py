"""Residue-level descriptors in the pool: distances between mass centers, coordination numbers.

Outside references:

* mdtraj's ``compute_center_of_mass`` (element masses) for the mass centers;
* the rational switching function written out by hand,
  ``s(r) = (1 - (r/r0)**6) / (1 - (r/r0)**12)`` (common practice in contact counting);
* adenylate kinase from the MDAnalysis test data (adk.psf + adk_dims.dcd, a closed-to-open
  transition; Beckstein, Denning, Perilla and Woolf, J. Mol. Biol. 394:160, 2009), with the
  domains defined there (from memory): CORE 1-29, 60-121, 160-214; NMP 30-59; LID 122-159.
"""

import json

import mdtraj as md
import numpy as np
import pytest

from cvdesign import Source, Spec, suggest
from cvdesign.cli import build_parser
from cvdesign.errors import InputError
from cvdesign.geometry import GeometryWarning, center_distance
from cvdesign.pool import (Descriptor, Pool, build_pool, candidate_pool, prefilter_group_pairs,
                           residue_groups)


@pytest.fixture(scope="module")
def adk(mda_data):
    top = str(mda_data / "adk.psf")
    traj = str(mda_data / "adk_dims.dcd")
    src = Source(top)
    src.add(traj, "closed", frames=(0, 30))
    src.add(traj, "open", frames=(68, 98))
    return src, md.load(traj, top=top)


@pytest.fixture(scope="module")
def adk_pool(adk):
    src, _ = adk
    return build_pool(src, kinds=("center_distance", "coordination"))


def _switch(r, r0):
    x = r / r0
    return (1 - x ** 6) / (1 - x ** 12)


# ------------------------------------------------------------------ descriptors
def test_group_descriptor_ids_labels_and_validation():
    d = Descriptor("center_distance", (), "center dist A-B", groups=((5, 3, 4, 9), (12,)))
    assert d.groups == ((3, 4, 5, 9), (12,)) and d.atoms == (3, 4, 5, 9, 12)
    assert d.id == "center_distance:3..5,9/12" and d.unit == "nm"
    assert not d.periodic and d.transforms == ("identity",)
    c = Descriptor("coordination", (), "coord A-B", groups=((0, 1), (2,)), r0=0.5)
    assert c.id == "coordination:0..1/2@0.5" and c.unit == "1"
    with pytest.raises(InputError, match="two non-empty atom groups"):
        Descriptor("center_distance", (), "x", groups=((1, 2),))
    with pytest.raises(InputError, match="two non-empty atom groups"):
        Descriptor("coordination", (), "x", groups=((1,), ()), r0=0.4)
    with pytest.raises(InputError, match="r0 > 0"):
        Descriptor("coordination", (), "x", groups=((1,), (2,)))


def test_cli_parses_the_group_kinds_and_their_switching_distance():
    args = build_parser().parse_args(
        ["suggest", "--topology", "t.pdb", "--state", "a", "a.xtc", "--state", "b", "b.xtc",
         "--kinds", "center_distance,coordination", "--coordination-r0", "0.5",
         "--out", "o"])
    assert args.kinds == ("center_distance", "coordination")
    assert args.coordination_r0 == 0.5


# ------------------------------------------------------------------ features
def test_center_distances_equal_mdtraj_centers_of_mass(adk, adk_pool):
    """Pool values of every center distance equal the distance between mdtraj's mass
    centers of the two residues' selected (heavy) atoms."""
    _, traj = adk
    sub = traj[::10]
    values = adk_pool.features(sub)
    idx = [i for i, d in enumerate(adk_pool.descriptors) if d.kind == "center_distance"]
    rng = np.random.default_rng(3)
    for i in rng.choice(idx, 40, replace=False):
        d = adk_pool.descriptors[i]
        ca = md.compute_center_of_mass(sub.atom_slice(list(d.groups[0])))
        cb = md.compute_center_of_mass(sub.atom_slice(list(d.groups[1])))
        ref = np.linalg.norm(cb - ca, axis=1)
        (col,) = adk_pool.features_of([i])
        # mdtraj works in float32: agreement to its precision
        np.testing.assert_allclose(values[:, col], ref, rtol=2e-5, atol=2e-6)


def test_coordination_numbers_equal_the_switching_sum_by_hand(adk, adk_pool):
    _, traj = adk
    sub = traj[::20]
    xyz = sub.xyz.astype(np.float64)
    values = adk_pool.features(sub)
    idx = [i for i, d in enumerate(adk_pool.descriptors) if d.kind == "coordination"]
    rng = np.random.default_rng(4)
    checked_nonzero = 0
    for i in rng.choice(idx, 30, replace=False):
        d = adk_pool.descriptors[i]
        a, b = np.array(d.groups[0]), np.array(d.groups[1])
        r = np.linalg.norm(xyz[:, a, None, :] - xyz[:, None, b, :], axis=-1)
        ref = _switch(r, d.r0).sum(axis=(1, 2))
        (col,) = adk_pool.features_of([i])
        np.testing.assert_allclose(values[:, col], ref, rtol=1e-9, atol=1e-9)
        checked_nonzero += bool(ref.max() > 0.5)
    assert checked_nonzero >= 5  # real contacts among the checked pairs


def test_group_features_in_a_triclinic_box_are_whole_and_minimum_image():
    """In a periodic box, shifting any atom by a box vector changes nothing (groups are
    made whole, center distances and pair distances are minimum images), and the values
    equal cvdesign.geometry's reference functions."""
    rng = np.random.default_rng(7)
    top = md.Topology()
    chain = top.add_chain()
    for k in range(3):
        res = top.add_residue("RES", chain, resSeq=k + 1)
        for name in ("C1", "C2", "N1"):
            top.add_atom(name, md.element.get_by_symbol(name[0]), res)
    box = np.array([[2.0, 0.0, 0.0], [0.6, 1.9, 0.0], [-0.4, 0.5, 2.1]])
    centers = np.array([[0.2, 0.2, 0.2], [1.6, 1.5, 1.7], [1.0, 0.3, 1.9]])
    xyz = np.repeat(centers, 3, axis=0)[None] + 0.12 * rng.standard_normal((4, 9, 3))
    groups = [(0, 1, 2), (3, 4, 5), (6, 7, 8)]
    descs = [Descriptor("center_distance", (), "c", groups=(groups[i], groups[j]))
             for i, j in ((0, 1), (0, 2), (1, 2))]
    descs += [Descriptor("coordination", (), "k", groups=(groups[i], groups[j]), r0=0.9)
              for i, j in ((0, 1), (1, 2))]
    pool = Pool(descs, top)
    cell = np.repeat(box[None], 4, axis=0)

    def traj(x):
        t = md.Trajectory(x.astype(np.float32), top)
        t.unitcell_vectors = cell.astype(np.float32)
        return t

    x32 = xyz.astype(np.float32).astype(np.float64)
    base = pool.features(traj(x32))
    shifted = x32.copy()
    shifted[:, 1] += box[0] - box[2]
    shifted[:, 7] += box[1]
    moved = pool.features(traj(shifted.astype(np.float32).astype(np.float64)))
    np.testing.assert_allclose(moved, base, atol=2e-6)
    masses = [[12.011, 12.011, 14.007]] * 2
    cell32 = cell.astype(np.float32).astype(np.float64)
    ref = center_distance(x32, groups[0], groups[1], cell32, masses_a=masses[0],
                          masses_b=masses[1])
    np.testing.assert_allclose(base[:, 0], ref, rtol=1e-6)
    # without a box the values differ (the box really matters here)
    plain = pool.features(md.Trajectory(x32.astype(np.float32), top))
    assert np.abs(plain - base).max() > 0.1


def test_features_from_an_atom_subset_chunk_equal_the_full_ones(adk, adk_pool):
    _, traj = adk
    sub = traj[:4]
    atoms = adk_pool.atom_indices()
    full = adk_pool.features(sub)
    part = adk_pool.features(sub.atom_slice(atoms), atom_indices=atoms)
    np.testing.assert_array_equal(part, full)


# ------------------------------------------------------------------ candidates
def test_residue_pairs_are_prefiltered_by_mean_center_distance(adk, adk_pool):
    """The kept residue pairs are exactly those whose mass centers, averaged over every
    10th frame of a state (mdtraj's centers of mass), come closer than 1 nm in at least
    one state, and the (at most 100) others that separate the states better than any of
    those (Fisher ratio over the same frames, states weighted equally)."""
    from cvdesign.pool.candidates import MAX_RESCUED_PAIRS

    src, traj = adk
    groups = residue_groups(src.topology, np.unique(np.concatenate(
        [d.atoms for d in adk_pool.descriptors])))
    assert len(groups) == 214
    com = np.stack([md.compute_center_of_mass(traj.atom_slice(list(g))) for _, g in groups],
                   axis=1)  # (frames, residues, 3)
    means, variances = [], []
    for lo in (0, 68):
        frames = com[lo:lo + 30][::10]
        d = np.linalg.norm(frames[:, :, None, :] - frames[:, None, :, :], axis=-1)
        means.append(d.mean(axis=0))
        variances.append(d.var(axis=0))
    ii, jj = np.triu_indices(len(groups), k=1)
    m = np.array([x[ii, jj] for x in means])
    v = np.array([x[ii, jj] for x in variances])
    close = m.min(axis=0) < 1.0
    fisher = ((m - m.mean(axis=0)) ** 2).mean(axis=0) / v.mean(axis=0)
    beyond = np.flatnonzero(~close & (fisher > fisher[close].max()))
    rescued = beyond[np.argsort(-fisher[beyond], kind="stable")[:MAX_RESCUED_PAIRS]]
    assert 0 < rescued.size  # (three frames per state: some far pairs do separate them)
    keep = close.copy()
    keep[rescued] = True
    expected = {(int(i), int(j)) for i, j, k in zip(ii, jj, keep) if k}
    first = {g[0]: k for k, (_, g) in enumerate(groups)}
    got = {(first[d.groups[0][0]], first[d.groups[1][0]])
           for d in adk_pool.descriptors if d.kind == "center_distance"}
    # pairs right at the cutoff (or at the best kept pair's Fisher ratio) may flip with
    # float32 vs float64 centers
    assert len(got ^ expected) <= 2
    assert len(got) > 1000
    kinds = {d.kind for d in adk_pool.descriptors}
    assert kinds == {"center_distance", "coordination"}
    assert sum(d.kind == "coordination" for d in adk_pool.descriptors) == len(got)
    assert any("group pairs: kept" in n for n in adk_pool.notes)


def test_prefilter_group_pairs_without_cutoff_keeps_everything(adk):
    src, _ = adk
    groups = [(0, 1), (4, 5), (10,)]
    kept, note = prefilter_group_pairs(groups, src, cutoff=np.inf)
    assert kept.tolist() == [[0, 1], [0, 2], [1, 2]] and "no cutoff" in note
    with pytest.raises(InputError, match="positive"):
        prefilter_group_pairs(groups, src, cutoff=0.0)


def test_one_residue_gives_no_group_descriptors(demo_files):
    top, states = demo_files
    src = Source(top)
    for state, files in states.items():
        src.add(files[0], state, frames=(0, 200))
    with pytest.raises(InputError, match="pool is empty"):
        build_pool(src, kinds=("center_distance",))
    pool = candidate_pool(src.topology, range(12), ("distance", "coordination"))
    assert all(d.kind == "distance" for d in pool.descriptors)
    assert any("fewer than two residues" in n for n in pool.notes)


# ------------------------------------------------------------------ end to end
@pytest.fixture(scope="module")
def adk_group_result(adk):
    src, _ = adk
    return suggest(src, kinds=("center_distance", "coordination"), max_terms=2,
                   n_suggestions=3, n_bootstrap=20)


def test_adk_residue_level_suggestions_join_domains_and_their_specs_evaluate_the_same(
        adk, adk_group_result, adk_domain):
    """On adenylate kinase, the best residue-level descriptors join two different
    domains (the LID and NMP domains close over the CORE), and each spec written for a
    suggestion evaluates, from coordinates alone, to the per-state mean and spread it
    records, and to the pool's own values of its descriptors."""
    _, traj = adk
    res = adk_group_result
    for row in res.scorecard[:5]:
        a, b = (traj.topology.atom(g[0]).residue.resSeq for g in row["groups"])
        assert adk_domain(a) != adk_domain(b), row["label"]
    for doc in res.specs:
        spec = Spec.from_dict(json.loads(json.dumps(doc)))
        values = spec.evaluate(traj.xyz)
        for name, frames in (("closed", slice(0, 30)), ("open", slice(68, 98))):
            stored = spec.states[name]
            assert values[frames].mean() == pytest.approx(stored["mean"], abs=1e-6)
            assert values[frames].std() == pytest.approx(stored["std"], rel=1e-4)
        for desc in doc["descriptors"]:
            assert desc["kind"] in ("center_distance", "coordination")
            assert len(desc["atom_identities"]) == 2
            if desc["kind"] == "center_distance":
                assert desc["weighting"] == "mass"
            else:
                assert (desc["r0"], desc["n"], desc["m"]) == (0.45, 6, 12)
        bare = {k: v for k, v in doc.items() if k != "reachable_range"}  # that of doc's terms
        single = Spec.from_dict({**bare, "terms": [{"descriptor": doc["descriptors"][0]["id"],
                                                    "transform": "identity", "center": 0.0,
                                                    "scale": 1.0, "weight": 1.0}]})
        i = next(k for k, d in enumerate(res.pool.descriptors)
                 if d.id == doc["descriptors"][0]["id"])
        (col,) = res.pool.features_of([i])
        np.testing.assert_allclose(single.evaluate(traj.xyz[:20]),
                                   res.pool.features(traj[:20])[:, col], rtol=1e-10, atol=1e-12)
    top = res.ranking[0]
    assert top["heldout_fisher_ratio"] > 50  # the states are far apart along it
    card = res.scorecard_csv().splitlines()
    first = res.scorecard[0]
    assert " / ".join(" ".join(map(str, g)) for g in first["groups"]) in card[1]


def test_pool_features_warn_about_a_residue_wider_than_half_the_box_naming_the_residue():
    top = md.Topology()
    chain = top.add_chain()
    for k in range(2):
        res = top.add_residue("RES", chain, resSeq=k + 1)
        for i in range(4):
            top.add_atom(f"C{i}", md.element.carbon, res)
    xyz = np.full((3, 8, 3), 1.0, dtype=np.float32)
    xyz[:, :4, 0] = [0.1, 0.5, 0.9, 1.3]  # RES1 spans 1.2 nm of a 2 nm box
    xyz[:, 4:, 0] = [1.0, 1.1, 1.2, 1.3]
    traj = md.Trajectory(xyz, top, unitcell_lengths=np.full((3, 3), 2.0),
                         unitcell_angles=np.full((3, 3), 90.0))
    pool = candidate_pool(top, range(8), kinds=("center_distance",))
    with pytest.warns(GeometryWarning, match=r"^the group of RES1 \(atoms 0\.\.3\): made whole "
                      r"about its first atom, the group comes back cut in some frames"):
        pool.features(traj)
