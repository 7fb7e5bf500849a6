"""The distance prefilter: what it keeps, what it must not drop, and its memory.

The prefilter keeps a pair when its mean distance is below the cutoff in some state; a pair
far apart in every state that separates the states better than every pair kept is kept too
(it had been dropped without a word, and the ranking went on with CVs that separate
nothing). Its sums are taken block by block, so memory is bounded by ``max_numbers``.
"""

import tracemalloc

import mdtraj as md
import numpy as np
import pytest

import cvdesign
from cvdesign.pool import prefilter_pairs
from cvdesign.pool.candidates import MAX_RESCUED_PAIRS


def _frames(rng, n, state):
    """Six atoms: 0-3 a noisy square of 0.5 nm (the same in both states); atom 4 is 1.3 nm
    above atom 0 in state A and 2.4 nm in state B (beyond a 1 nm cutoff in both); atom 5 is
    3 nm below, and in state B 0.4 nm below in a fifth of the frames (mean about 2.5 nm)."""
    x = np.zeros((n, 6, 3))
    x[:, 1], x[:, 2], x[:, 3] = [0.5, 0, 0], [0, 0.5, 0], [0.5, 0.5, 0]
    x[:, :4] += rng.normal(scale=0.05, size=(n, 4, 3))
    x[:, 4] = [0, 0, 1.3 if state == "A" else 2.4]
    x[:, 5] = [0, 0, -3.0]
    if state == "B":
        x[rng.random(n) < 0.2, 5] = [0, 0, -0.4]
    x[:, 4:] += rng.normal(scale=0.05, size=(n, 2, 3))
    return x.astype(np.float32)


@pytest.fixture(scope="module")
def far_apart(tmp_path_factory):
    d = tmp_path_factory.mktemp("prefilter")
    top = md.Topology()
    chain = top.add_chain()
    for k in range(6):
        top.add_atom(f"C{k}", md.element.carbon, top.add_residue("LIG", chain, k + 1))
    rng = np.random.default_rng(7)
    files = {"A": [], "B": []}
    for state in files:
        for run in range(2):
            path = d / f"{state}{run}.dcd"
            md.Trajectory(_frames(rng, 400, state), top).save_dcd(str(path))
            files[state].append(str(path))
    md.Trajectory(_frames(rng, 1, "A"), top).save_pdb(str(d / "top.pdb"))
    return cvdesign.Source.from_states(str(d / "top.pdb"), files)


def test_a_pair_far_apart_in_every_state_that_separates_them_is_kept(far_apart):
    pairs = np.array([(i, j) for i in range(6) for j in range(i + 1, 6)])
    kept, note = prefilter_pairs(pairs, far_apart, cutoff=1.0)
    kept = {tuple(p) for p in kept.tolist()}
    assert (0, 4) in kept  # 1.3 nm vs 2.4 nm: above the cutoff in both states
    assert {(0, 1), (0, 2), (1, 3), (2, 3)} <= kept  # (below it)
    assert ("kept besides" in note and "separate the states better than any pair below it"
            in note)
    # without a second state nothing separates, and nothing beyond the cutoff is kept
    one = cvdesign.Source.from_states(far_apart.topology_path, {
        "all": [str(s.path) for s in far_apart.segments]})
    kept_one, note_one = prefilter_pairs(pairs, one, cutoff=1.0)
    assert (0, 4) not in {tuple(p) for p in kept_one.tolist()} and "besides" not in note_one


def test_suggest_finds_the_separating_distance_beyond_the_cutoff(far_apart):
    # with the pair dropped, rank 1 had a held-out Fisher ratio of 0.007 (overlap 0.85)
    result = cvdesign.suggest(far_apart, n_bootstrap=0, max_terms=1, selection="all",
                              kinds=("distance",))
    assert result.ranking[0]["heldout_fisher_ratio"] > 10
    assert any("kept besides" in n for n in result.notes)


def test_at_most_max_rescued_pairs_are_kept_beyond_the_cutoff():
    from cvdesign.pool.candidates import _separating_beyond_cutoff

    rng = np.random.default_rng(0)
    means = np.vstack([rng.uniform(2, 3, 500), rng.uniform(3, 4, 500)])
    variances = np.full((2, 500), 0.01)
    keep = np.zeros(500, dtype=bool)
    got = _separating_beyond_cutoff(means, variances, keep)
    assert got.size == MAX_RESCUED_PAIRS and np.all(np.diff(got) > 0)
    sep = (means[1] - means[0]) ** 2  # the best separated, whatever their order
    assert set(got) == set(np.argsort(-sep, kind="stable")[:MAX_RESCUED_PAIRS])


def test_prefilter_memory_is_bounded_by_max_numbers_and_its_means_do_not_depend_on_it(
        far_apart, tmp_path):
    # The blocks of pairs had been joined into one array of every distance of a group of
    # frames (2 x frames x pairs x 4 bytes for 10^4 atoms: about 20 GB), whatever
    # max_numbers said. Now each block is added into the sums as it is computed.
    rng = np.random.default_rng(3)
    n_atoms, n_frames = 200, 500
    top = md.Topology()
    chain = top.add_chain()
    for k in range(n_atoms):
        top.add_atom("C", md.element.carbon, top.add_residue("LIG", chain, k + 1))
    xyz = rng.uniform(0, 3, (n_frames, n_atoms, 3)).astype(np.float32)
    files = {}
    for state in ("A", "B"):
        path = tmp_path / f"{state}.dcd"
        md.Trajectory(xyz, top).save_dcd(str(path))
        files[state] = [str(path)]
    md.Trajectory(xyz[:1], top).save_pdb(str(tmp_path / "top.pdb"))
    source = cvdesign.Source.from_states(str(tmp_path / "top.pdb"), files)
    pairs = np.array([(i, j) for i in range(n_atoms) for j in range(i + 1, n_atoms)])
    whole = 4 * 50 * len(pairs)  # one group's distances (50 frames at stride 10), float32
    results, peaks = [], []
    for max_numbers in (50_000, 10 ** 9):
        tracemalloc.start()
        results.append(prefilter_pairs(pairs, source, cutoff=1.5, max_numbers=max_numbers))
        peaks.append(tracemalloc.get_traced_memory()[1])
        tracemalloc.stop()
    # (seen: 4.7 MB bounded, 15.7 MB unbounded, for 4.0 MB of one group's distances; the
    # rest is the read chunk and the sums)
    assert peaks[0] < 1.5 * whole and peaks[0] < 0.5 * peaks[1], (peaks, whole)
    assert np.array_equal(results[0][0], results[1][0]) and results[0][1] == results[1][1]


@pytest.mark.filterwarnings("ignore:atom_indices are not monotonically increasing")
def test_a_strided_read_of_some_atoms_of_a_trr_file_gives_the_frames_of_an_xtc(tmp_path):
    """mdtraj's TRR reader crashed the process (memory corruption, no message) when given a
    stride and an atom subset together, as the prefilter reads; the source reads whole
    frames of a TRR then and takes the atoms: the same coordinates as the XTC of the frames,
    in the order the atoms were asked for."""
    rng = np.random.default_rng(40)
    top = md.Topology()
    res = top.add_residue("TRR", top.add_chain())
    for i in range(30):
        top.add_atom(f"C{i}", md.element.carbon, res)
    traj = md.Trajectory(rng.uniform(0, 2, size=(60, 30, 3)).astype(np.float32), top,
                         time=np.arange(60.0), unitcell_lengths=np.full((60, 3), 4.0),
                         unitcell_angles=np.full((60, 3), 90.0))
    for ext in ("trr", "xtc"):
        traj.save(str(tmp_path / f"run.{ext}"))
    atoms = [29, 3, 17, 4]
    got = {}
    for ext in ("trr", "xtc"):
        src = cvdesign.Source(top, chunk_size=7).add(str(tmp_path / f"run.{ext}"), "a")
        chunks = list(src.iter_chunks(atom_indices=atoms, stride=3))
        got[ext] = (np.concatenate([c.trajectory.xyz for c in chunks]),
                    np.concatenate([c.frames for c in chunks]))
    np.testing.assert_array_equal(got["trr"][1], np.arange(0, 60, 3))
    np.testing.assert_array_equal(got["trr"][1], got["xtc"][1])
    np.testing.assert_allclose(got["trr"][0], traj.xyz[::3][:, atoms], atol=1e-6)
    np.testing.assert_allclose(got["trr"][0], got["xtc"][0], atol=2e-3)  # (XTC: 1e-3 nm)
