"""The rows of scorecard.csv: unscored descriptors (constant, frozen) leave their cells
empty rather than writing a value that was not measured, and docs/scorecard-v1.md lists
exactly the file's columns."""

import csv
import io
import re
from pathlib import Path

import mdtraj as md
import numpy as np
import pytest

from cvdesign import Source, suggest
from cvdesign.pipeline.suggest import N_BINS
from cvdesign.score.univariate import overlap_coefficient
from cvdesign.testbed.amide import place_atom

DOC = Path(__file__).resolve().parents[1] / "docs" / "scorecard-v1.md"
FRAMES = 300  # frames per run
FIXED_C5_NM = np.array([0.13, 0.1, 0.19])  # where C5 sits in every frame of state A


def _place(a, b, c, bond, angle, dihedral):
    """Per frame, the position of an atom bonded to `c` (bond nm, angle b-c-x and dihedral
    a-b-c-x in rad): the testbed's ``place_atom`` frame by frame."""
    a, b, c = (np.broadcast_to(v, (len(angle), 3)) for v in (a, b, c))
    bonds = np.broadcast_to(bond, len(angle))
    return np.array([place_atom(*args) for args in zip(a, b, c, bonds, angle, dihedral)])


def _ar1(rng, n, mean, sd, corr=0.9):
    """A stationary AR(1) series of `n` values (mean, standard deviation, lag-1 correlation)."""
    x = np.empty(n)
    x[0] = rng.normal(0.0, sd)
    kick = sd * np.sqrt(1.0 - corr * corr)
    for t in range(1, n):
        x[t] = corr * x[t - 1] + rng.normal(0.0, kick)
    return mean + x


def _chain_runs(rng, state):
    """Frames of an invented five-atom chain C1..C5: C1, C2, C3 never move (the angle
    C1-C2-C3 is the same in every frame: constant), C4 turns about C2-C3 (its dihedral
    separates the states); C5 follows C4 in state B and sits at one fixed point in every
    frame of state A (C1-C5 and C2-C5 frozen there)."""
    a, b, c = np.array([0.0, 0.0, 0.0]), np.array([0.15, 0.0, 0.0]), np.array([0.2, 0.14, 0.0])
    phi = _ar1(rng, FRAMES, -1.0 if state == "A" else 1.0, 0.3)
    theta = _ar1(rng, FRAMES, 1.9, 0.05)
    xyz = np.zeros((FRAMES, 5, 3))
    xyz[:, 0], xyz[:, 1], xyz[:, 2] = a, b, c
    xyz[:, 3] = _place(a, b, c, 0.15, theta, phi)
    if state == "A":
        xyz[:, 4] = FIXED_C5_NM
    else:
        xyz[:, 4] = _place(b, c, xyz[:, 3], 0.15, _ar1(rng, FRAMES, 1.7, 0.2),
                           _ar1(rng, FRAMES, 0.5, 0.6))
    return xyz.astype(np.float32)


@pytest.fixture(scope="module")
def chain(tmp_path_factory):
    """The chain's runs (two per state, 1 ps apart), their topology, and `suggest` on them
    with a lag of 2 ps and a small bootstrap (the score card's intervals)."""
    tmp = tmp_path_factory.mktemp("chain")
    top = md.Topology()
    res = top.add_residue("CHN", top.add_chain(), resSeq=1)
    atoms = [top.add_atom(f"C{i + 1}", md.element.carbon, res) for i in range(5)]
    for x, y in zip(atoms, atoms[1:]):
        top.add_bond(x, y)
    rng = np.random.default_rng(11)
    src, trajs = Source(top), {"A": [], "B": []}
    for state in ("A", "B"):
        for k in range(2):
            traj = md.Trajectory(_chain_runs(rng, state), top,
                                 time=np.arange(FRAMES, dtype=np.float64))
            path = tmp / f"{state}{k}.xtc"
            traj.save_xtc(str(path))
            trajs[state].append(md.load(str(path), top=top))  # as stored (xtc precision)
            src.add(str(path), state)
    result = suggest(src, lag=2.0, n_bootstrap=20, max_terms=2, n_suggestions=2)
    return result, trajs


def _csv_rows(result):
    return {r["id"]: r for r in csv.DictReader(io.StringIO(result.scorecard_csv()))}


SCORE_COLUMNS = ("fisher_ratio", "overlap", "autocorrelation", "autocorrelation_within_runs")


def test_a_constant_descriptor_has_empty_score_cells_and_a_note(chain):
    result, _ = chain
    rows = {r["id"]: r for r in result.scorecard}
    row = rows["angle:0-1-2"]  # C1-C2-C3: the same value in every frame of every state
    for name in SCORE_COLUMNS:
        assert row[name] is None, name
        assert f"{name}_ci" not in row, name  # the bootstrap ran: others have intervals
    assert rows["dihedral:0-1-2-3"]["fisher_ratio_ci"] is not None
    assert row["integrated_time"] is None and not row["screened"]
    assert row["note"] == "constant: not scored"
    cells = _csv_rows(result)["angle:0-1-2"]
    for name in SCORE_COLUMNS:
        for column in (name, f"{name}_ci_low", f"{name}_ci_high"):
            assert cells[column] == "", column  # not 0 (Fisher, autocorrelations) nor 1
    assert cells["integrated_time_ps"] == "" and cells["note"] == "constant: not scored"


def test_a_frozen_descriptor_reports_only_its_histogram_overlap_with_its_interval(chain):
    result, trajs = chain
    rows = {r["id"]: r for r in result.scorecard}
    row = rows["distance:0-4"]  # C1-C5: one value in every frame of state A
    assert row["note"] == ("frozen: does not move within state(s) A; not scored (only the "
                           "overlap of its histograms is reported)")
    for name in ("fisher_ratio", "autocorrelation", "autocorrelation_within_runs"):
        assert row[name] is None and f"{name}_ci" not in row, name
    # the overlap is what its note says: the overlapping coefficient of the two states'
    # histograms on the card's bins (N_BINS over the range of every frame), here computed
    # directly from the stored frames with numpy
    d = {s: np.concatenate([md.compute_distances(t, [[0, 4]])[:, 0] for t in ts])
         for s, ts in trajs.items()}
    assert np.ptp(d["A"]) == 0.0 and np.ptp(d["B"]) > 0.05  # frozen in A only
    lo, hi = min(v.min() for v in d.values()), max(v.max() for v in d.values())
    hist = np.stack([np.histogram(d[s], bins=N_BINS, range=(lo, hi))[0] for s in "AB"])
    expected = float(overlap_coefficient(hist[:, None, :].astype(float))[0])
    assert 0.01 < expected < 0.5  # A's value lies within B's spread: a real, partial overlap
    assert row["overlap"] == pytest.approx(expected, abs=1e-9)
    low, high = row["overlap_ci"]
    assert 0.0 <= low <= high <= 1.0
    cells = _csv_rows(result)["distance:0-4"]
    assert cells["fisher_ratio"] == "" and cells["autocorrelation"] == ""
    assert float(cells["overlap"]) == pytest.approx(expected, rel=1e-5)
    assert cells["overlap_ci_low"] != "" and cells["overlap_ci_high"] != ""


def _doc_columns():
    """The column names of the table under '## Columns' of docs/scorecard-v1.md, in order."""
    text = DOC.read_text(encoding="utf-8")
    section = text.split("\n## Columns\n", 1)[1].split("\n## ", 1)[0]
    names = []
    for line in section.splitlines():
        m = re.match(r"\|\s*`([a-z_]+)`\s*\|", line)
        if m:
            names.append(m.group(1))
    return names


def test_the_format_doc_lists_exactly_the_columns_of_scorecard_csv(chain, tmp_path):
    result, _ = chain
    result.write(tmp_path / "out")
    with open(tmp_path / "out" / "scorecard.csv", newline="", encoding="utf-8") as fh:
        header = next(csv.reader(fh))
    assert len(header) > 20  # the header was read
    assert _doc_columns() == header
