"""Screening: which descriptors go on from the score card to the search, per objective.

A pool larger than ``screen_size`` keeps the best descriptors by the objective's own score
for one descriptor; a test with a small screen size shows what each objective keeps.
"""

import mdtraj as md
import numpy as np
import pytest

import cvdesign


def _ar1(rng, n, mean, sd, corr):
    """A stationary AR(1) series: mean, standard deviation, lag-1 correlation."""
    x = np.empty(n)
    x[0] = rng.normal()
    e = rng.normal(size=n)
    for t in range(1, n):
        x[t] = corr * x[t - 1] + np.sqrt(1.0 - corr ** 2) * e[t]
    return mean + sd * x


def _chain(theta, phi, r=0.15):
    """Four atoms: the angle 0-1-2 is `theta` (rad), the dihedral 0-1-2-3 is `phi` (rad);
    the angle 1-2-3 is held at 1.9 rad. Bond lengths `r` nm."""
    n = theta.size
    x = np.zeros((n, 4, 3))
    x[:, 1] = [r, 0.0, 0.0]
    x[:, 2] = np.stack([r - r * np.cos(theta), r * np.sin(theta), np.zeros(n)], -1)
    b, c = x[:, 1], x[:, 2]
    bc = (c - b) / np.linalg.norm(c - b, axis=-1, keepdims=True)
    nrm = np.cross(b - x[:, 0], bc)
    nrm /= np.linalg.norm(nrm, axis=-1, keepdims=True)
    m = np.cross(nrm, bc)
    t2 = 1.9
    d = np.stack([-r * np.cos(t2) * np.ones(n), r * np.sin(t2) * np.cos(phi),
                  r * np.sin(t2) * np.sin(phi)], -1)
    x[:, 3] = c + d[:, 0:1] * bc + d[:, 1:2] * m + d[:, 2:3] * nrm
    return x.astype(np.float32)


def _topology():
    """The four bonded carbons of :func:`_chain`."""
    top = md.Topology()
    res = top.add_residue("TOY", top.add_chain())
    atoms = [top.add_atom(f"C{i + 1}", md.element.carbon, res) for i in range(4)]
    for i in range(3):
        top.add_bond(atoms[i], atoms[i + 1])
    return top


@pytest.fixture(scope="module")
def fast_and_slow(tmp_path_factory):
    """Two states: the angle 0-1-2 separates them strongly but moves fast (white noise);
    the dihedral 0-1-2-3 separates them less but moves slowly (AR(1), 0.995 per frame)."""
    d = tmp_path_factory.mktemp("screen")
    top = _topology()
    rng = np.random.default_rng(11)
    files = {"A": [], "B": []}
    for state, theta0, phi0 in (("A", 1.85, 0.5), ("B", 2.20, -0.5)):
        for k in range(2):
            n = 1500
            x = _chain(_ar1(rng, n, theta0, 0.04, 0.0), _ar1(rng, n, phi0, 0.35, 0.995))
            path = d / f"{state}-{k}.xtc"
            md.Trajectory(x, top, time=np.arange(n, dtype=float)).save_xtc(str(path))
            files[state].append(str(path))
    md.Trajectory(x[:1], top).save_pdb(str(d / "toy.pdb"))
    return cvdesign.Source.from_states(str(d / "toy.pdb"), files)


def _screened(result):
    return {row["id"] for row in result.scorecard if row["screened"]}


def test_objective_both_screens_by_slowness_within_runs_not_about_one_mean(fast_and_slow):
    # About one common mean, runs that stay in their states make every separating
    # descriptor look slow, so a screen by J/(1+J) * rho_pooled counted separation twice
    # and kept the fast angle (J ~ 19) over the slow dihedral (J ~ 8, rho within runs
    # ~ 0.99), which the objective itself ranks first. Screened by the objective's own form
    # for one descriptor, the dihedral goes on.
    both = cvdesign.suggest(fast_and_slow, objective="both", lag=2.0, screen_size=1,
                            n_bootstrap=0, max_terms=1, kinds=("angle", "dihedral"),
                            selection="all")
    separate = cvdesign.suggest(fast_and_slow, objective="separate", screen_size=1,
                                n_bootstrap=0, max_terms=1, kinds=("angle", "dihedral"),
                                selection="all")
    rows = {row["id"]: row for row in both.scorecard}
    angle, dihedral = "angle:0-1-2", "dihedral:0-1-2-3"
    # the premise: the angle separates better, the dihedral is slower within the runs
    assert rows[angle]["fisher_ratio"] > 1.5 * rows[dihedral]["fisher_ratio"]
    assert rows[dihedral]["autocorrelation_within_runs"] > 0.9
    assert rows[angle]["autocorrelation_within_runs"] < 0.2
    assert _screened(separate) == {angle}  # separation alone keeps the angle
    assert _screened(both) == {dihedral}
    assert {t["descriptor"] for t in both.ranking[0]["terms"]} == {dihedral}  # (cos, sin)
    note = [n for n in both.notes if n.startswith("screening:")]
    assert len(note) == 1 and "the best 1 of" in note[0] and "rho within runs" in note[0]


def test_no_screening_note_when_every_scored_descriptor_goes_on(fast_and_slow):
    result = cvdesign.suggest(fast_and_slow, n_bootstrap=0, max_terms=1,
                              kinds=("angle", "dihedral"), selection="all")
    assert not [n for n in result.notes if n.startswith("screening:")]


def test_one_short_run_no_longer_caps_every_integrated_time(tmp_path):
    # The integrated-time lag grid ran to half the *shortest* run: one 40-frame run made
    # every slower descriptor's time a lower bound (and the card's blocks whole runs). Now
    # up to half the longest run; the short run drops out of the lags it cannot hold.
    # Reference: an AR(1) series x_t = r x_{t-1} + noise has the integrated time
    # 1/2 + r / (1 - r) frames (Sokal 1997, in *Functional Integration*, Plenum).
    top = _topology()
    rng = np.random.default_rng(5)
    r = 0.95
    files = {"A": [], "B": []}
    for state, theta0, phi0, lengths in (("A", 1.8, 0.6, (1500, 1500)),
                                         ("B", 2.2, -0.6, (1500, 1500, 40))):
        for k, n in enumerate(lengths):
            x = _chain(_ar1(rng, n, theta0, 0.04, 0.0), _ar1(rng, n, phi0, 0.3, r))
            path = tmp_path / f"{state}-{k}.xtc"
            md.Trajectory(x, top, time=np.arange(n, dtype=float)).save_xtc(str(path))
            files[state].append(str(path))
    md.Trajectory(x[:1], top).save_pdb(str(tmp_path / "toy.pdb"))
    src = cvdesign.Source.from_states(str(tmp_path / "toy.pdb"), files)
    result = cvdesign.suggest(src, n_bootstrap=0, max_terms=1, kinds=("dihedral",),
                              selection="all")
    row = {row["id"]: row for row in result.scorecard}["dihedral:0-1-2-3"]
    assert row["integrated_time_decayed"]  # (half the short run is 20 frames: it was not)
    lo, hi = row["integrated_time_ci"]
    assert lo <= 0.5 + r / (1 - r) <= hi  # frames of 1 ps


def test_few_frames_in_a_state_get_the_overlap_bias_note(fast_and_slow):
    # The overlap of histograms of few frames is biased low (measured in the note's text):
    # with 3000 frames per state nothing is said, with 400 in one state the note names it.
    from cvdesign.pipeline.suggest import _overlap_note

    result = cvdesign.suggest(fast_and_slow, n_bootstrap=0, max_terms=1,
                              kinds=("angle", "dihedral"), selection="all")
    assert not [n for n in result.notes if n.startswith("overlap:")]
    note = _overlap_note(["A", "B"], np.array([[3000, 0], [0, 400]]), None)
    assert len(note) == 1 and note[0].startswith("overlap: few frames ('B' 400; histograms of")


def test_the_lag_grid_keeps_pairs_of_every_state_at_every_lag():
    # Up to half the longest run of all, a state of short runs (3 x 60 frames beside
    # 3 x 2000) dropped out of the long lags, and the report's curves about one common mean
    # then lost the offset between the states there (452 ps falling to 2.3 ps, no word).
    # The grid ends at half the longest run of the state whose longest run is shortest;
    # one short run beside long ones of its state still does not cap it.
    from cvdesign.pipeline.timing import iat_lags

    short_state = np.array([[60, 0]] * 3 + [[0, 2000]] * 3)
    assert int(iat_lags(short_state).max()) == 30
    one_short_run = np.array([[40, 0], [2000, 0], [0, 2000], [0, 2000]])
    assert int(iat_lags(one_short_run).max()) == 1000


def test_runs_too_short_for_a_time_mark_it_a_lower_bound(tmp_path):
    # An AR(1) series of r = 0.99 (integrated time 1/2 + r/(1 - r) = 99.5 frames; Sokal
    # 1997) in three runs of 60 frames per state: about its own mean, each short run
    # decorrelates at once, and a time of a few frames came out "decayed", with an
    # interval. The runs' means scatter far more than such a time allows: now a lower bound,
    # for the descriptor and for the ranked CV, and the notes say why.
    top = md.Topology()
    res = top.add_residue("TOY", top.add_chain())
    for i in range(2):
        top.add_atom(f"C{i}", md.element.carbon, res)
    rng = np.random.default_rng(4)
    files = {"A": [], "B": []}
    for state, mu in (("A", 1.0), ("B", 1.5)):
        for k in range(3):
            x = np.zeros((60, 2, 3), np.float32)
            x[:, 1, 0] = _ar1(rng, 60, mu, 0.1, 0.99)
            path = tmp_path / f"{state}{k}.xtc"
            md.Trajectory(x, top, time=np.arange(60, dtype=float)).save_xtc(str(path))
            files[state].append(str(path))
    md.Trajectory(x[:1], top).save_pdb(str(tmp_path / "top.pdb"))
    result = cvdesign.suggest(cvdesign.Source.from_states(str(tmp_path / "top.pdb"), files),
                              n_bootstrap=0, max_terms=1, selection="all", kinds=("distance",))
    (row,) = result.scorecard
    assert row["integrated_time"] < 20 and row["integrated_time_decayed"] is False
    assert "integrated_time_ci" not in row
    assert result.ranking[0]["integrated_time_decayed"] is False
    assert any(n.startswith("integrated times: for 1 of the screened descriptors the runs of "
                            "some state are too short") for n in result.notes)
    assert any(n.startswith("integrated times: for 1 of the ranked CVs the runs of some state "
                            "are too short") for n in result.notes)


def test_runs_long_enough_are_not_called_too_short_however_many():
    # The time measured about each run's own mean is a little low (by about tau^2 / n per
    # run), which 200 runs made "significant": the scatter must also imply a time at least
    # three times the measured one. AR(1) runs of 200 frames, 20 times their time of 10 frames;
    # and a state given by its own (larger) time is tested with it, not with a pooled one.
    from cvdesign.pipeline.timing import runs_too_short
    from cvdesign.stats.moments import DiagonalLaggedMoments

    rng = np.random.default_rng(3)
    r = 19.0 / 21.0  # integrated time 1/2 + r / (1 - r) = 10 frames
    runs = {(k, 0): DiagonalLaggedMoments.from_series(_ar1(rng, 200, 0.0, 1.0, r)[:, None],
                                                      lag=1) for k in range(200)}
    assert not runs_too_short(runs, {0: [6.2]}, 1).any()  # (about what is measured)
    assert runs_too_short(runs, {0: [0.5]}, 1).all()  # a time far too short: flagged
    # reweighted runs of 4 effective frames each (Kish): their means may scatter as much
    few = {key: 4.0 for key in runs}
    assert not runs_too_short(runs, {0: [0.5]}, 1, effective=few).any()
