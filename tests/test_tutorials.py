"""Every tutorial script runs to completion on the bundled demo.

The tutorials selected in a session are started when the session starts, one after the
other in a background thread (:func:`start_tutorials`, called by the ``early_tutorials``
fixture of conftest.py), so that on a machine of two cores they run beside the rest of the
suite instead of after it; the tests here wait for their output. One at a time keeps the
number of busy processes near the number of cores. Each script runs exactly as it would
alone (same interpreter, environment and arguments), so its output does not depend on
when it ran.
"""

import importlib.util
import re
import subprocess
import sys
import threading
from pathlib import Path

import numpy as np
import pytest

TUTORIALS = sorted((Path(__file__).resolve().parent.parent / "tutorials").glob("*.py"))


def _run(script, cwd, *args):
    return subprocess.run([sys.executable, str(script), *map(str, args)], capture_output=True,
                          text=True, cwd=cwd)


#: Tutorials that run for half a minute or more; CI runs them, ``-m "not slow"`` skips them.
SLOW = {"03_hand_off.py", "04_real_engine.py", "05_refine.py"}

#: Tutorials that run OpenMM (the ``openmm`` extra); skipped where it is not installed.
NEEDS_OPENMM = {"04_real_engine.py"}


class _Started:
    """Tutorial runs done one after another in a daemon thread: ``result(script)`` waits."""

    def __init__(self, scripts, tmp_path_factory):
        self._runs = {s: (tmp_path_factory.mktemp("tutorial"), threading.Event(), [])
                      for s in scripts}
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._work, daemon=True)
        self._thread.start()

    def _work(self):
        for script, (cwd, done, box) in self._runs.items():
            try:
                if not self._stop.is_set():
                    box.append(_run(script, cwd, cwd / "out"))
            except BaseException as exc:  # reported by the test that waits for it
                box.append(exc)
            finally:
                done.set()

    def __contains__(self, script):
        return script in self._runs

    def result(self, script):
        """(working directory, output directory, completed process) of `script`."""
        cwd, done, box = self._runs[script]
        done.wait()
        if not box:
            pytest.fail(f"tutorial {script.name} was not run: the session is stopping")
        if isinstance(box[0], BaseException):
            raise box[0]
        return cwd, cwd / "out", box[0]

    def stop(self):
        """Start no further tutorial (one that is running finishes)."""
        self._stop.set()


def start_tutorials(items, tmp_path_factory):
    """Start the tutorials that the selected `items` of this module need, longest first.

    Returns a :class:`_Started`, or None when no tutorial is selected.
    """
    scripts = set()
    for item in items:
        params = getattr(getattr(item, "callspec", None), "params", {})
        if getattr(item, "module", None) is sys.modules[__name__] and "tutorial_run" in params:
            scripts.add(params["tutorial_run"])
    runnable = [s for s in scripts
                if s.name not in NEEDS_OPENMM or importlib.util.find_spec("openmm") is not None]
    if not runnable:
        return None
    # the long ones first, so that they overlap the most of the other tests
    order = sorted(runnable, key=lambda s: (s.name not in NEEDS_OPENMM, s.name not in SLOW,
                                            s.name))
    return _Started(order, tmp_path_factory)


@pytest.fixture(scope="module", params=[
    pytest.param(p, id=p.name, marks=[pytest.mark.slow] if p.name in SLOW else [])
    for p in TUTORIALS])
def tutorial_run(request, tmp_path_factory, early_tutorials):
    """(script, working directory, output directory, completed process), run once each."""
    if request.param.name in NEEDS_OPENMM:
        pytest.importorskip("openmm")
    started = early_tutorials.get(__name__)
    if started is not None and request.param in started:
        return (request.param, *started.result(request.param))
    cwd = tmp_path_factory.mktemp("tutorial")
    out = cwd / "out"
    return request.param, cwd, out, _run(request.param, cwd, out)


def test_there_is_at_least_one_tutorial():
    assert [p.name for p in TUTORIALS][:1] == ["01_first_suggestions.py"]
    assert {"02_reading_the_report.py", "03_hand_off.py", "04_real_engine.py",
            "05_refine.py"} <= {p.name for p in TUTORIALS}


def test_tutorial_exits_0_and_writes_only_its_output_directory(tutorial_run):
    script, cwd, out, res = tutorial_run
    assert res.returncode == 0, res.stdout + res.stderr
    assert "Caution: " in res.stdout
    assert (out / "cv-01.json").is_file() and (out / "ranking.json").is_file()
    assert sorted(p.name for p in cwd.iterdir()) == ["out"]


def test_first_tutorial_compares_each_state_with_the_spec(tutorial_run):
    script, _, _, res = tutorial_run
    if script.name != "01_first_suggestions.py":
        pytest.skip("checks the output of tutorial 01 only")
    for state in ("closed", "open"):
        line = next(x for x in res.stdout.splitlines() if x.strip().startswith(f"{state}:"))
        assert "±" in line and "spec:" in line and "over 6000 frames" in line
    assert "warning:" not in res.stdout
    assert "cvdesign apply" in res.stdout



def test_report_tutorial_draws_every_figure_and_reads_their_numbers(tutorial_run):
    """Tutorial 02: the report of the demo has every figure, and the held-out histograms it
    reads agree with the specs' per-state means."""
    script, _, out, res = tutorial_run
    if script.name != "02_reading_the_report.py":
        pytest.skip("checks the output of tutorial 02 only")
    assert (out / "report.html").is_file() and (out / "report-data.json").is_file()
    assert "wrote report.html: 12 figures, 0 marked 'not available'" in res.stdout
    rows = re.findall(r"^\s+(closed|open): held-out ([-+]\d+\.\d+) ± (\d+\.\d+);  spec "
                      r"([-+]\d+\.\d+) ± (\d+\.\d+)", res.stdout, re.MULTILINE)
    assert len(rows) == 2 * 3  # two states, three ranked CVs
    for _, mean, std, ref_mean, ref_std in rows:
        assert abs(float(mean) - float(ref_mean)) <= 0.05 * float(ref_std) + 0.002
    for figure in ("held-out histograms", "-kT ln p", "along time", "weights of the terms",
                   "the pool's best descriptors", "redundancy groups", "implied timescales"):
        assert figure in res.stdout, figure


def _number(pattern, text):
    match = re.search(pattern, text, re.MULTILINE)
    assert match, f"no line matching {pattern!r} in:\n{text}"
    return [float(g) for g in match.groups()]


def _output_of(tutorial_run, name):
    """Standard output of tutorial `name` (the test is skipped for the other tutorials)."""
    script, _, _, res = tutorial_run
    if script.name != name:
        pytest.skip(f"checks the output of {name} only")
    return res.stdout


def _transitions(out, poor_label):
    """Transitions along the rank-1 CV and along the poor CV, as the tutorial prints them."""
    (best,) = _number(r"^transitions with rank-1 CV \(cv-01\): (\d+)$", out)
    (poor,) = _number(rf"^transitions with {poor_label} CV \(.+\): (\d+)$", out)
    return best, poor


def test_hand_off_tutorial_biases_the_rank1_cv_and_recovers_delta_f(tutorial_run):
    """Tutorial 03: the rank-1 CV, biased through the spec's evaluator, gives many more
    transitions than a poorly ranked CV in the same steps, and the free-energy
    difference recovered from the bias (F = -gamma/(gamma-1) V, Barducci, Bussi and
    Parrinello, Phys. Rev. Lett. 2008) is within 1 kJ/mol of the reference from
    reweighted unbiased runs of the same molecule with its latch torsion switched off
    (an exact identity; Zwanzig, J. Chem. Phys. 1954, from memory).

    Measured on 2026-12-03 on this machine, the test's configuration, seeds 2026-2035 (the
    tutorial's SEED changed for the measurement only; the suggestions do not depend on it):
    the estimate from the bias gave +0.46, +0.58, +0.75, +0.78, +0.17, +0.96, +0.42, +0.63,
    +0.47, +0.36 kJ/mol, a standard deviation of 0.23; the reference gave +0.57, +0.39,
    +0.77, +0.39, +0.27, +0.51, +0.56, +0.54, +0.37, +0.51, a standard deviation of 0.14,
    while its own error bars (jackknife over its 32 independent walkers, each with about 35
    crossings) said 0.15-0.22 (root mean square 0.17): the error bar is honest. |estimate -
    reference| was 0.11, 0.19, 0.03, 0.39, 0.11, 0.46, 0.14, 0.09, 0.10, 0.15 (mean signed
    difference +0.07 +- 0.07: no bias seen). The tolerance is 3 combined standard
    deviations (common practice), 3 * sqrt(0.23**2 + 0.14**2) = 0.81, rounded up to 1.0
    (ten seeds only, so each standard deviation is itself uncertain by about 25%); the
    2 kJ/mol used before was about 9 of them and would have passed a real disagreement of
    1.5 kJ/mol. The reference's error bar is held below 0.3, near the measured scatter the
    tolerance rests on. At every seed the rank-1 CV gave 307-362 transitions and the
    poorly ranked one 0."""
    out = _output_of(tutorial_run, "03_hand_off.py")
    best, poor = _transitions(out, "poorly ranked")
    assert best >= 50
    assert poor <= best / 5
    (delta,) = _number(r"^F\(closed\) - F\(open\) from the bias: ([-+]\d+\.\d+) kJ/mol$", out)
    ref, err = _number(r"^F\(closed\) - F\(open\) reference: ([-+]\d+\.\d+) ± (\d+\.\d+) "
                       r"kJ/mol$", out)
    assert 0 < err < 0.3  # as precise as when the tolerance was measured (0.15-0.22)
    assert abs(delta - ref) < 1.0
    # the rank-1 spec was the one biased, its hints used, and the caution printed
    assert "rank-1 CV cv-01:" in out and "bias factor" in out
    assert "warning" not in tutorial_run[3].stderr.lower(), tutorial_run[3].stderr


def test_real_engine_tutorial_drives_more_transitions_along_the_rank1_cv(tutorial_run):
    """Tutorial 04 (OpenMM, Ac-Pro-NHMe, quick configuration): the exported rank-1 CV,
    biased in OpenMM, drives cis/trans transitions where a poorly ranked CV (the best of
    bond angles only) drives fewer in the same steps; OpenMM's CV equals the spec's
    evaluator on the biased frames."""
    out = _output_of(tutorial_run, "04_real_engine.py")
    best, poor = _transitions(out, "poorly ranked")
    assert best > poor and best >= 5
    for match in re.finditer(r"largest difference (\S+);", out):
        assert float(match.group(1)) < 1e-9
    assert len(re.findall(r"largest difference", out)) == 3  # CV 1, the poor CV, CV 2
    assert "100% of frames in trans" in out and "100% of frames in cis" in out
    assert "not a production sampler" in out


def test_real_engine_tutorial_recovers_delta_f_of_the_reference(tutorial_run):
    """Tutorial 04: F(cis) - F(trans) from the reweighted frames of the rank-1 run
    (well-tempered reweighting, Tiwary and Parrinello, J. Phys. Chem. B 2015) is within
    3.5 kJ/mol of the reference computed in the tutorial without CV or bias: the amide's
    torsion terms scaled down to 0.3 and up again within each state, a thermodynamic cycle
    (Zwanzig, J. Chem. Phys. 1954) solved with MBAR (Shirts and Chodera, J. Chem. Phys.
    2008), in four independent repeats, with many crossings at the lowest scale.

    Measured on this machine, quick configuration, seeds 2026-2032 (the tutorial's SEED
    changed for the measurement only): the reference gave 5.83, 6.01, 6.41, 6.52, 5.70,
    5.69, 6.18 kJ/mol, a standard deviation of 0.33 (its own error bars, from the
    repeats, 0.13-0.59); the reweighted estimate gave 6.40, 7.45, 6.28, 4.11, 7.09, 6.33,
    5.60, a standard deviation of 1.1 (largest |estimate - reference| 2.41, at 2029). The
    tolerance is 3 combined standard deviations (common practice), 3 * sqrt(0.33**2 +
    1.09**2) = 3.4, rounded up: the check fails on a real disagreement, not by chance at one seed; most
    of it is the estimate's own scatter (seven seeds only, so that standard deviation is
    itself uncertain by about 30%). Those estimates came from specs built on the dihedral
    features of mdtraj's angle; with the current float32 cos and sin (the same physics,
    other last bits, so each chaotic run takes another path) seeds 2026-2030 gave 4.18,
    6.22, 6.16, 5.88, 5.42 (measured on the branch that brought them, 2026-12-03), each
    within 2 kJ/mol of that seed's reference above. (With
    the terms switched fully off, as before, the reference gave 6.74, 4.26, 5.78, 8.50,
    3.07 at seeds 2026-2030, a standard deviation of 2.1, and the 2 kJ/mol tolerance then
    used failed at two of those five seeds.)"""
    out = _output_of(tutorial_run, "04_real_engine.py")
    (delta,) = _number(r"^F\(cis\) - F\(trans\) from the reweighted frames: ([-+]\d+\.\d+) "
                       r"kJ/mol$", out)
    ref, error = _number(r"^F\(cis\) - F\(trans\) reference: ([-+]\d+\.\d+) ± (\d+\.\d+) "
                         r"kJ/mol ", out)
    (crossings,) = _number(r"; (\d+) crossings with the terms scaled down;", out)
    assert crossings >= 100 and error < 1.0  # measured: 236-310 crossings, errors 0.13-0.59
    assert abs(delta - ref) < 3.5


def test_refine_tutorial_moves_cv2_onto_the_latch_torsion(tutorial_run):
    """Tutorial 05: from a biased run along a lower-ranked distance (CV 1), the frames
    labelled by basin give a CV 2 built on the latch torsion C3-C4-C5-C6, which the
    distance lacks; CV 2 separates the held-out walkers' basins better than CV 1, and a
    biased run along it, with the same settings, turns the torsion more often."""
    script, out_dir, _, res = tutorial_run
    if script.name != "05_refine.py":
        pytest.skip("checks the output of tutorial 05 only")
    out = res.stdout
    assert re.search(r"^CV 1 \(rank 3 of the basin runs\): \+1\.0000 identity\(distance",
                     out, re.MULTILINE)
    added = next(x for x in out.splitlines() if x.startswith("terms added: "))
    assert "dihedral LCH1:C3-C4-C5-C6" in added
    removed = next(x for x in out.splitlines() if x.startswith("terms removed: "))
    assert "dist LCH1:C2-C6" in removed
    # Measured across seeds (the tutorial's SEED 2026-2039, 2026-12-03; a change of the
    # code's last bits sends these chaotic runs down another path, like another seed):
    # every seed gave the same CV 1, the torsion added and C2-C6 removed; j1 38.5-41.2;
    # j2 bimodal, 215-277 at five seeds and 614-3000 at nine, so j2 / j1 5.4-76 (the
    # 5x bound once used passed at 5.4, 5.9, 6.7 and 6.8); crossings along CV 2 13-33
    # (30 at the default seed), along CV 1 0 at every seed. The bounds below are those
    # claims with room for that scatter: j2 more than twice j1, and CV 2 crossing at
    # least 5 times where CV 1 crosses less. Those j were measured before
    # fisher_separation became the ranking's ratio, half the one it gave then (so j1 is
    # about 20 now: 20.1 at the default seed on 2026-12-03 evening, j2 202, 24 crossings
    # along CV 2); the bounds compare ratios, which that factor leaves alone.
    (j1,) = _number(r"^Fisher ratio of CV 1 on the held-out walkers: (\S+)$", out)
    (j2,) = _number(r"^Fisher ratio of CV 2 on the held-out walkers: (\S+)$", out)
    assert j2 > 2 * j1
    (c1,) = _number(r"^crossings along CV 1: (\d+) ", out)
    (c2,) = _number(r"^crossings along CV 2: (\d+) ", out)
    # the distance drives the walkers off its basin cores without turning the torsion
    assert c2 >= 5 and c1 < c2
    assert "warning" not in res.stderr.lower(), res.stderr


def test_real_engine_tutorial_refines_cv1_from_its_biased_run_and_judges_cv2_by_transitions(
        tutorial_run):
    """Tutorial 04, second half: the biased run along CV 1 fed back (frames labelled by the
    basins of CV 1, bias energies for reweighting) gives a CV 2 that compare_specs
    describes, and a biased run along CV 2 with the same steps is judged by its cis/trans
    transitions. Checked: what holds whatever CV 2 turns out to be (in the quick
    configuration it is CV 1 again, ranked on the transition slowness of the fed-back
    crossings: see the tutorial), not which CV it is."""
    out = _output_of(tutorial_run, "04_real_engine.py")
    walkers = re.findall(r"^  walker \d: cis: (\d+) frames \(ESS (\S+)\); trans: (\d+) frames "
                         r"\(ESS (\S+)\); (\d+) transition frames; (\d+) crossings", out,
                         re.MULTILINE)
    assert len(walkers) == 2
    totals = np.array([[float(v) for v in w] for w in walkers]).sum(axis=0)
    # both basins visited and weighted, transition frames between them, core-to-core
    # crossings of CV 1 in its own run
    assert totals[0] > 0 and totals[2] > 0 and totals[1] > 0 and totals[3] > 0
    assert totals[4] > 0 and totals[5] >= 1
    assert "suggest on the biased frames (objective both, lag " in out
    # the lag, chosen from the run: no longer than either basin's longest visit in
    # rescaled time (lagged pairs never span a visit), and suggest warns that it is short
    # for rescaled time exactly when the tutorial says that no lag could avoid it
    lag, cis_visit, trans_visit = _number(r"^  lag (\d+) frames \(.+longest visits: cis "
                                          r"(\d+\.\d), trans (\d+\.\d) frame spacings", out)
    assert 1 <= lag <= min(cis_visit, trans_visit) + 0.05
    assert ("so suggest warns" in out) == ("warning: the lag is short for rescaled time" in out)
    for state in ("cis", "trans"):
        assert f"note: effective sample size (Kish) of state '{state}'" in out
    # compare_specs: the terms kept, added and removed, and a cosine that is 0 exactly when
    # no term is kept
    kept = next(x for x in out.splitlines() if x.startswith("terms kept: "))
    (cosine,) = _number(r"^\|cosine\| of the standardized weight vectors: (\S+)$", out)
    assert re.search(r"^terms added: ", out, re.MULTILINE)
    assert re.search(r"^terms removed: ", out, re.MULTILINE)
    assert 0.0 <= cosine <= 1.0 and (cosine == 0.0) == (kept == "terms kept: none")
    # by separation alone the biased frames give CV 1 back (the torsion's cos, Fisher ratio
    # in the thousands against tens for any distance)
    (again,) = _number(r"^for comparison, objective separate on the same frames: .+ "
                       r"\(\|cosine\| with CV 1 (\S+)\)$", out)
    assert again > 0.99
    # the same yardstick for both runs, and a verdict that follows the numbers
    (c1,) = _number(r"^transitions with CV 1 \(rank-1 CV, cv-01\): (\d+)$", out)
    (c2,) = _number(r"^transitions with CV 2 \(refined\): (\d+)$", out)
    (best,) = _number(r"^transitions with rank-1 CV \(cv-01\): (\d+)$", out)
    assert c1 == best
    # counts within 2 sqrt(n1 + n2) of each other read as no difference (Poisson counts:
    # common practice), and a CV 2 at |cosine| >= 0.99 with CV 1 is CV 1 again
    chance = 2.0 * np.sqrt(c1 + c2)
    if cosine >= 0.99:
        expected = "verdict: CV 2 is CV 1 again"
    elif abs(c2 - c1) <= chance:
        expected = "verdict: CV 2 and CV 1 drove as many transitions within chance"
    else:
        expected = f"verdict: CV 2 drove {'more' if c2 > c1 else 'fewer'} transitions than CV 1"
    assert expected in out
    assert sum(line.startswith("verdict: ") for line in out.splitlines()) == 1
    assert "CV 2 (refined): sigma" in out  # CV 2 was biased through its own hints
