"""The report (issue 11): figures from an output directory, one self-contained report.html.

The data the figures draw beyond the tables comes from the pipeline's own
``report-data.json`` (``cvdesign.pipeline.report_data``; format in docs/report-data-v1.md).
The checks here compare what is drawn with the tables and with independent computations
from the trajectories: the spec's own evaluator on the traced frames, the held-out
histograms' per-state means against the spec's, the proposed states of the TICA picture
against states.csv, the funnel positions against the frames aligned onto the reference
pocket with ``align_to_reference_pocket``.
"""

import base64
import csv
import html
import json
import re
import shutil
import tempfile
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import mdtraj as md
import numpy as np
import pytest

from cvdesign import Source, load_spec, suggest
from cvdesign.cli import main
from cvdesign.constants import BOLTZMANN_KJ_MOL_K
from cvdesign.errors import InputError
from cvdesign.report import figures as fg
from cvdesign.report import build_report, read_output, write_report


# ---------------------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def demo_out(tmp_path_factory, demo_files):
    """suggest on the demo (a small bootstrap), written as the CLI writes it (with
    report-data.json)."""
    top, states = demo_files
    res = suggest(Source.from_states(top, states), n_bootstrap=20, n_suggestions=3, seed=0)
    out = tmp_path_factory.mktemp("demo") / "out"
    res.write(out)
    return out


@pytest.fixture(scope="module")
def demo_without_data(tmp_path_factory, demo_out):
    """The same directory without its report-data.json (as an older cvdesign wrote it)."""
    out = tmp_path_factory.mktemp("demo-bare") / "out"
    shutil.copytree(demo_out, out)
    (out / "report-data.json").unlink()
    return out


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))


def _parse(text):
    """The page through an XML parser (well-formed) and the HTML parser (its tags)."""
    root = ET.fromstring(text.split("\n", 1)[1])  # after <!DOCTYPE html>
    collect = _Collect()
    collect.feed(text)
    return root, collect.tags


def _svgs(tags):
    out = []
    for tag, attrs in tags:
        if tag == "img":
            assert attrs["src"].startswith("data:image/svg+xml;base64,")
            out.append(base64.b64decode(attrs["src"].split(",", 1)[1]).decode("utf-8"))
    return out


def _funnel_positions(spec_path, topology, paths):
    """(z, r) in nm of the ligand centre of every bound frame in the restraint's frame, from
    the frames themselves: the pocket fitted onto the spec's reference pocket by
    ``align_to_reference_pocket`` (Kabsch 1976), then projected on the spec's axis."""
    from cvdesign.bias.funnel import align_to_reference_pocket

    spec = load_spec(spec_path)
    (funnel,) = spec.restraints
    lig, pocket = funnel["groups"]
    traj = md.join([md.load(p, top=topology) for p in paths])
    aligned, _ = align_to_reference_pocket(traj.xyz.astype(np.float64), pocket,
                                           funnel["reference_pocket_nm"])
    d = aligned[:, lig].mean(axis=1) - aligned[:, pocket].mean(axis=1)
    axis = np.asarray(funnel["axis"])
    z = d @ axis
    return z, np.linalg.norm(d - z[:, None] * axis, axis=1)


def _states_csv(out_dir, paths):
    """{path: per-frame proposed state} from states.csv."""
    by_name = {Path(p).name: p for p in paths}
    labels = {p: [] for p in paths}
    with open(out_dir / "states.csv") as fh:
        for row in csv.DictReader(fh):
            labels[by_name[Path(row["file"]).name]].append(row["state"])
    return {p: np.array(v) for p, v in labels.items()}


@pytest.fixture(scope="module")
def runs_out(tmp_path_factory, hopping_runs):
    """suggest --runs through the command (report data written by the pipeline)."""
    d = tmp_path_factory.mktemp("runs")
    top, paths = hopping_runs(d)
    out = d / "out"
    assert main(["suggest", "--topology", top, "--runs", *paths, "--lag", "1", "--out",
                 str(out), "--bootstrap", "0", "--max-terms", "1", "--suggestions", "2",
                 "--kinds", "distance", "--quiet"]) == 0
    labels = _states_csv(out, paths)
    states = sorted(set(np.concatenate(list(labels.values()))))
    return {"out": out, "top": top, "paths": paths, "labels": labels, "states": states}


@pytest.fixture(scope="module")
def host_guest(tmp_path_factory):
    from cvdesign.testbed.host_guest import write_host_guest

    return write_host_guest(tmp_path_factory.mktemp("hg"), n_runs=2, n_frames=60)


def _funnel(data, out, *extra):
    return main(["funnel", "--topology", data.topology, "--bound", *data.paths,
                 "--ligand", data.ligand_selection, "--pocket", data.pocket_selection,
                 "--out", str(out), *extra])


def _figures(target):
    return {f.name: f for f in build_report(read_output(target)).figures}


def _external(value):
    """Whether a src/href value points outside the page (anything but #id or data:)."""
    return not (value.startswith("#") or value.startswith("data:"))


# ------------------------------------------------------------------------------ tests
def test_state_colours_are_the_okabe_ito_palette_in_input_order_and_cycle():
    # Okabe and Ito (2008), "Color Universal Design": orange, sky blue, bluish green,
    # yellow, blue, vermillion, reddish purple, black.
    assert fg.PALETTE == ("#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00",
                          "#CC79A7", "#000000")
    names = [f"S{i}" for i in range(10)]
    colors = fg.state_colors(names)
    assert [colors[n] for n in names[:8]] == list(fg.PALETTE)
    assert colors["S8"] == fg.PALETTE[0] and colors["S9"] == fg.PALETTE[1]


def test_report_is_well_formed_self_contained_and_every_figure_has_alt_text(demo_out):
    path = write_report(demo_out)
    text = path.read_text(encoding="utf-8")
    assert text.startswith("<!DOCTYPE html>\n")
    root, tags = _parse(text)  # well-formed XML: every element closed
    assert root.tag == "html"
    names = [t for t, _ in tags]
    assert "script" not in names and "link" not in names and "iframe" not in names
    for tag, attrs in tags:
        for key in ("src", "href"):
            if key in attrs:
                assert not _external(attrs[key]), (tag, key, attrs[key][:60])
    assert "url(" not in text and "@import" not in text and "http://" not in text \
        and "https://" not in text
    imgs = [a for t, a in tags if t == "img"]
    report = build_report(read_output(demo_out))
    assert len(imgs) == len(report.figures) == 3 * 3 + 3  # per CV 3, pool, groups, timescales
    for attrs, fig in zip(imgs, report.figures):
        assert attrs["alt"] == fig.alt and len(fig.alt) > 40
        svg = base64.b64decode(attrs["src"].split(",", 1)[1]).decode("utf-8")
        assert svg == fig.svg
        svg_root = ET.fromstring(svg.encode("utf-8"))
        for el in svg_root.iter():
            for key, value in el.attrib.items():
                if key.endswith("href") or key == "src":
                    assert not _external(value), value[:60]
    assert report.missing == () and "not available" not in text
    assert "@media print" in text and "Caution." in text
    assert "starting points to validate, not guarantees" in text
    # the summary is there too, rendered
    assert "<h4>Inputs</h4>" in text and "<td>closed-1.xtc</td>" in text


def test_figures_draw_the_numbers_of_the_spec_the_ranking_and_the_score_card(demo_out):
    out = demo_out
    figs = _figures(out)
    ranking = json.loads((out / "ranking.json").read_text())
    data = json.loads((out / "report-data.json").read_text())
    kt = BOLTZMANN_KJ_MOL_K * 300.0
    for r, cv in zip(ranking["ranking"], data["cvs"]):
        stem = Path(r["spec"]).stem
        spec = json.loads((out / r["spec"]).read_text())
        dist = figs[f"{stem}-distributions"].data
        # the per-state means and spreads drawn are those of the spec
        assert dist["means"] == {s: spec["states"][s]["mean"] for s in ranking["states"]}
        assert dist["stds"] == {s: spec["states"][s]["std"] for s in ranking["states"]}
        edges = np.array(cv["heldout"]["edges"])
        assert dist["edges"] == cv["heldout"]["edges"]
        for s in ranking["states"]:
            counts = np.array(cv["heldout"]["counts"][s], dtype=float)
            beyond = sum(cv["heldout"]["outside"][s])
            # every frame of the state is held out exactly once (in its own fold)
            assert counts.sum() + beyond == spec["states"][s]["n_frames"]
            density = np.array(dist["density"][s])
            np.testing.assert_allclose(density,
                                       counts / (counts.sum() + beyond) / np.diff(edges))
            assert np.sum(density * np.diff(edges)) == pytest.approx(
                counts.sum() / (counts.sum() + beyond))
            prof = np.array([np.nan if v is None else v for v in dist["profile_kj_mol"][s]])
            seen = counts > 0
            assert np.isnan(prof[~seen]).all() and np.nanmin(prof) == 0.0
            ref = -kt * np.log(density[seen])
            np.testing.assert_allclose(prof[seen], ref - ref.min(), atol=1e-9)
        # the traces: every point, in its state
        traces = figs[f"{stem}-traces"].data
        assert traces["n_files"] == len(cv["traces"]) == 6
        for panel, tr in zip(traces["panels"], cv["traces"]):
            assert panel["file"] == tr["file"] and panel["x"] == "time_ps"
            assert panel["per_state"] == {s: tr["state"].count(s) for s in set(tr["state"])}
            assert panel["value_min"] == min(tr["value"])
            # 2000 frames per file, every second one (at most 1000 points), 0.2 ps apart
            assert tr["frame"] == list(range(0, 2000, 2))
            np.testing.assert_allclose(tr["time_ps"], np.arange(0, 2000, 2) * 0.2)
        # the terms: weights, intervals and selection frequencies of the ranking
        w = figs[f"{stem}-weights"].data
        assert w["weights"] == [t["weight"] for t in r["terms"]]
        assert w["weight_ci"] == [t["weight_ci"] for t in r["terms"]]
        assert w["selection_frequency"] == [t["selection_frequency"] for t in r["terms"]]
    # the pool: the first 30 rows of scorecard.csv, with their intervals
    with open(out / "scorecard.csv") as fh:
        card = list(csv.DictReader(fh))
    pool = figs["pool-scores"].data
    assert pool["ids"] == [row["id"] for row in card[:30]]
    assert pool["fisher_ratio"] == [float(row["fisher_ratio"]) for row in card[:30]]
    assert pool["fisher_ratio_ci"][0] == [float(card[0]["fisher_ratio_ci_low"]),
                                          float(card[0]["fisher_ratio_ci_high"])]
    assert pool["autocorrelation"] == [float(row["autocorrelation"]) for row in card[:30]]
    groups = figs["redundancy-groups"].data
    label = {row["id"]: row["label"] for row in card}
    expected = [(row["label"], [label[m] for m in row["stands_for"].split()])
                for row in card if row["stands_for"]]
    assert list(zip(groups["representatives"], groups["members"])) == expected
    assert expected  # the demo has a redundant pair (a torsion and its 1-4 distance)
    ts = figs["implied-timescales"].data
    assert ts["curves"] == {f"rank {c['rank']}": {"lag_ps": c["timescales"]["lag_ps"],
                                                   "timescale_ps": c["timescales"]["timescale_ps"]}
                            for c in data["cvs"]}
    # the second panel: within runs (each run about its own mean)
    assert ts["within"] == {
        f"rank {c['rank']}": {"lag_ps": c["timescales"]["lag_ps"],
                              "timescale_ps": c["timescales"]["timescale_within_runs_ps"]}
        for c in data["cvs"]}


def test_report_data_agrees_with_the_specs_evaluator_and_the_ranking(demo_out, demo_files):
    top, states = demo_files
    paths = {Path(p).name: p for files in states.values() for p in files}
    ranking = json.loads((demo_out / "ranking.json").read_text())
    data = json.loads((demo_out / "report-data.json").read_text())
    assert data["states"] == ranking["states"] and data["lag_ps"] == ranking["lag_ps"] == 2.0
    assert data["temperature_k"] == 300.0 and data["tica"] is None
    for r, cv in zip(ranking["ranking"], data["cvs"]):
        assert (cv["rank"], cv["spec"], cv["units"]) == (r["rank"], r["spec"], "CV units")
        spec = load_spec(demo_out / r["spec"])
        # traces: the spec's reference evaluator on the same frames of the trajectory (the
        # pipeline's features come from mdtraj in single precision)
        for tr in cv["traces"]:
            traj = md.load(paths[tr["file"]], top=top)[tr["frame"]]
            np.testing.assert_allclose(tr["value"], spec.evaluate(traj), atol=2e-5)
            assert set(tr["state"]) == {tr["file"].split("-")[0]}
        # held-out histograms: frames of each fold along the direction fitted without that
        # fold, mapped to CV units; their per-state mean and spread are near the spec's
        # (all frames along the direction fitted on all of them), within a bin or so
        edges = np.array(cv["heldout"]["edges"])
        centres, width = 0.5 * (edges[1:] + edges[:-1]), edges[1] - edges[0]
        for s in ranking["states"]:
            c = np.array(cv["heldout"]["counts"][s], dtype=float)
            mean = float(c @ centres / c.sum())
            std = float(np.sqrt(c @ (centres - mean) ** 2 / c.sum()))
            ref = spec.states[s]
            assert abs(mean - ref["mean"]) < 0.05 * ref["std"] + width, (r["spec"], s)
            assert abs(std - ref["std"]) < 0.1 * ref["std"] + width, (r["spec"], s)
        # the CV is signed so that the last state lies higher, on held-out frames too
        closed = np.array(cv["heldout"]["counts"]["closed"])
        opened = np.array(cv["heldout"]["counts"]["open"])
        assert closed @ centres / closed.sum() < opened @ centres / opened.sum()
        # implied timescales: at the run's lag, the autocorrelation of the ranking (all runs
        # about their common mean); pairs across fold boundaries, which the ranking leaves
        # out, make the small difference
        ts = cv["timescales"]
        assert ts["lag_ps"] == sorted(ts["lag_ps"]) and 2.0 in ts["lag_ps"]
        rho = np.exp(-2.0 / ts["timescale_ps"][ts["lag_ps"].index(2.0)])
        assert rho == pytest.approx(r["autocorrelation_all"], abs=2e-3)


def test_every_numeric_axis_has_a_unit_and_a_state_has_one_colour_everywhere(demo_out):
    figs = _figures(demo_out)
    unit = re.compile(r"\((?:[^()]*\(CV units\)[^()]*|[^()]+)\)|/ \w+")
    for fig in figs.values():
        assert fig.axes
        for ax in fig.axes:
            for which in ("x", "y"):
                if ax[f"{which}_ticks"] == "numeric":
                    assert unit.search(ax[which]), (fig.name, which, ax[which])
    expected = fg.state_colors(["closed", "open"])
    coloured = [f for f in figs.values() if "colors" in f.data]
    assert len(coloured) == 6  # distributions and traces of the three CVs
    for fig in coloured:
        assert fig.data["colors"] == expected
        for color in expected.values():
            assert color.lower() in fig.svg.lower(), fig.name


def test_report_without_report_data_marks_those_figures_not_available(demo_without_data):
    report = build_report(read_output(demo_without_data))
    names = [f.name for f in report.figures]
    assert names == ["cv-01-weights", "cv-02-weights", "cv-03-weights", "pool-scores",
                     "redundancy-groups"]
    assert len(report.missing) == 3 * 2 + 1
    assert all(m.startswith("not available: ") and "report-data.json is missing" in m
               for m in report.missing)
    assert 'class="missing">not available: held-out histograms' in report.html
    _, tags = _parse(report.html)
    assert len([t for t, _ in tags if t == "img"]) == len(names)


def test_suggest_writes_the_report_that_cvdesign_report_rebuilds_byte_for_byte(
        demo_files, tmp_path, capsys):
    top, states = demo_files
    runs = []
    for k in (1, 2):
        out = tmp_path / f"try{k}" / "out"
        out.parent.mkdir()
        argv = ["suggest", "--topology", top, "--out", str(out), "--bootstrap", "20",
                "--suggestions", "2", "--max-terms", "2", "--seed", "3", "--quiet"]
        for name, files in states.items():
            argv += ["--state", name, *files[:2]]
        assert main(argv) == 0
        assert f"open {out / 'report.html'} in a browser" in capsys.readouterr().out
        runs.append(out)
    first = (runs[0] / "report.html").read_bytes()
    assert first == (runs[1] / "report.html").read_bytes()  # same inputs and seed
    assert (runs[0] / "report-data.json").read_bytes() == \
        (runs[1] / "report-data.json").read_bytes()
    # every figure is drawn from the directory's own files
    assert b"not available" not in first and b"Every figure of this report was drawn" in first
    assert (runs[0] / "report.html").stat().st_mode & 0o777 == \
        (runs[0] / "ranking.json").stat().st_mode & 0o777
    # rebuilt from the directory alone, in another process (another hash seed)
    import subprocess
    import sys

    import cvdesign
    root = str(Path(cvdesign.__file__).resolve().parent.parent)
    (runs[0] / "report.html").unlink()
    res = subprocess.run([sys.executable, "-m", "cvdesign.cli", "report", str(runs[0])],
                         capture_output=True, text=True, timeout=300,
                         env={"PYTHONPATH": root, "PYTHONHASHSEED": "123", "PATH": ""})
    assert res.returncode == 0, res.stderr
    assert (runs[0] / "report.html").read_bytes() == first
    assert main(["report", str(runs[0]), "--out", str(tmp_path / "copy.html")]) == 0
    assert (tmp_path / "copy.html").read_bytes() == first
    # --force replaces an earlier output holding the report and its data
    argv[argv.index("--out") + 1] = str(runs[0])
    assert main(argv + ["--force", "--no-report"]) == 0
    assert not (runs[0] / "report.html").exists()


def test_no_report_skips_the_report_of_suggest_and_demo(tmp_path, capsys):
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out), "--bootstrap", "0", "--no-report"]) == 0
    assert not (out / "report.html").exists() and (out / "ranking.json").exists()
    assert "report.html" not in capsys.readouterr().out


def _small_suggest(demo_files, out):
    """A quick `cvdesign suggest` of one run per state of the demo, into `out`."""
    top, states = demo_files
    argv = ["suggest", "--topology", top, "--out", str(out), "--bootstrap", "0",
            "--suggestions", "1", "--max-terms", "1", "--quiet"]
    for name, files in states.items():
        argv += ["--state", name, files[0]]
    return argv


def test_a_failing_report_leaves_the_tables_and_exits_2(demo_files, tmp_path, capsys,
                                                         monkeypatch):
    import cvdesign.report

    def fail(output):
        raise OSError(28, "No space left on device")
    monkeypatch.setattr(cvdesign.report, "build_report", fail)
    out = tmp_path / "out"
    assert main(_small_suggest(demo_files, out)) == 2
    err = capsys.readouterr().err
    assert re.search(r"cvdesign suggest: error: the other outputs were written, but the report "
                     r"could not be: .*No space left on device\. Run 'cvdesign report .*out' "
                     r"once the cause is fixed", err), err
    assert "Traceback" not in err
    assert sorted(p.name for p in out.iterdir()) == [
        "cv-01.json", "ranking.csv", "ranking.json", "report-data.json", "scorecard.csv",
        "summary.md"]
    assert [p.name for p in tmp_path.iterdir()] == ["out"]  # no temporary file left


def test_an_interrupt_while_the_report_is_built_leaves_no_output(demo_files, tmp_path, capsys,
                                                                  monkeypatch):
    # The report is built in memory and written with the other outputs, all or nothing: built
    # after them, a Ctrl-C in its few seconds left every output but the page (and the
    # message said nothing was written), and a rerun then met a non-empty directory.
    import cvdesign.report

    def interrupted(output):
        raise KeyboardInterrupt
    monkeypatch.setattr(cvdesign.report, "build_report", interrupted)
    assert main(_small_suggest(demo_files, tmp_path / "out")) == 130
    assert "interrupted; no output was written" in capsys.readouterr().err
    assert list(tmp_path.iterdir()) == []


def test_runs_report_draws_the_frames_in_the_tica_plane_by_proposed_state(runs_out):
    out, labels = runs_out["out"], runs_out["labels"]
    data = json.loads((out / "report-data.json").read_text())
    tica = data["tica"]
    report = build_report(read_output(out))
    assert report.missing == () and "not available" not in (out / "report.html").read_text()
    # the sample: at most 5000 frames, each with the proposed state states.csv gives it
    names = [Path(p).name for p in runs_out["paths"]]
    assert tica["files"] == names and tica["lag_ps"] == 1.0
    n = len(tica["coords"])
    assert 0 < n <= 5000 and len(tica["state"]) == len(tica["frame"]) == len(tica["file"]) == n
    by_name = {Path(p).name: labels[p] for p in runs_out["paths"]}
    expected = [by_name[names[f]][t] for f, t in zip(tica["file"], tica["frame"])]
    assert tica["state"] == expected
    # 3 runs of 1500 frames, fewer than 5000: every frame, in file and frame order
    assert tica["frame"] == [t for _ in names for t in range(1500)]
    assert tica["file"] == [f for f in range(3) for _ in range(1500)]
    figs = {f.name: f for f in report.figures}
    drawn = figs["tica-states"].data
    assert drawn["counts"] == {s: tica["state"].count(s) for s in runs_out["states"]}
    xy = np.array(tica["coords"])
    lab = np.array(tica["state"])
    for s, c in drawn["centroids"].items():
        np.testing.assert_allclose(c, xy[lab == s].mean(axis=0), atol=1e-9)
    # the states lie apart along the slowest coordinate (S1 below S2: they are named so)
    assert drawn["centroids"]["S1"][0] < drawn["centroids"]["S2"][0]
    assert drawn["colors"] == fg.state_colors(runs_out["states"])
    ts = figs["implied-timescales"].data["tica"]
    assert ts == {"lag_ps": tica["lag_ps"], "timescales_ps": tica["timescales_ps"],
                  "resolved": tica["timescales_resolved"]}
    # the longest run is the ranking's (1500 frames of 0.1 ps); these timescales lie below it
    longest = json.loads((out / "ranking.json").read_text())["ranking"][0]["longest_run_ps"]
    assert tica["longest_run_ps"] == longest == 150.0
    assert tica["timescales_resolved"] == [t < longest for t in tica["timescales_ps"]]
    assert len(ts["timescales_ps"]) == 2 and ts["timescales_ps"][0] > 1.0
    # the traces are coloured by the proposed state of each frame (from states.csv)
    for tr in data["cvs"][0]["traces"]:
        assert tr["state"] == by_name[tr["file"]][tr["frame"]].tolist()
    traces = figs["cv-01-traces"].data["panels"]
    assert all(len(p["per_state"]) == 2 for p in traces)  # the runs hop between the states
    assert "Proposed states" in report.html and "states proposed from unlabelled runs" \
        in report.html
    # TICA's timescales are lower bounds (variational principle: Noe and Nueske, Multiscale
    # Model. Simul. 2013), on the axes and in the timescale figure's caption
    assert tica["n_slow"] in (1, 2)
    tfig = figs["tica-states"]
    assert tfig.data["used"] == [True, tica["n_slow"] == 2]
    assert "a lower bound" in tfig.data["axis_labels"][0]
    assert "lower bounds on the true ones" in tfig.caption
    assert "lower bounds on the true timescales" in figs["implied-timescales"].caption
    assert "The runs are biased" not in figs["implied-timescales"].caption + tfig.caption
    assert "fraction of the frames (reweighted for biased runs" in report.html


def test_runs_report_of_biased_runs_says_so_in_each_caption(runs_out, tmp_path):
    # The -kT ln p panel said "unbiased-sampling estimate", the TICA picture drew biased frames
    # without a word about their weights, the timescales' lags in rescaled time unsaid. The
    # report knows the runs are biased from heldout.weighted; here the runs' report data is
    # marked so (the figures' numbers are not the subject).
    out = tmp_path / "out"
    shutil.copytree(runs_out["out"], out)
    path = out / "report-data.json"
    data = json.loads(path.read_text())
    for cv in data["cvs"]:
        cv["heldout"]["weighted"] = list(data["states"])
    path.write_text(json.dumps(data))
    figs = {f.name: f for f in build_report(read_output(out)).figures}
    dist = figs["cv-01-distributions"]
    assert "from the frames of biased runs reweighted by exp(V/kT)" in dist.caption
    assert "unbiased sampling" not in dist.caption
    assert "\u2212kT ln p per state at 300 K: reweighted" in dist.svg
    assert "drawn without their reweighting factors exp(V/kT)" in figs["tica-states"].caption
    assert "lags and timescales are in rescaled time" in figs["implied-timescales"].caption
    assert figs["implied-timescales"].data["biased"] is True


def test_tica_figure_labels_a_second_coordinate_faster_than_the_lag_as_unused():
    # The reviewer's case: lag 20 ps, second timescale 12.7 ps, clustered in the first only;
    # the axis had read "slow coordinate 2 (... timescale 12.7 ps)".
    xy = np.random.default_rng(3).normal(size=(40, 2))
    lab = ["S1"] * 20 + ["S2"] * 20
    for n_slow in (1, None):  # None: a document without n_slow, judged by the timescale
        fig = fg.tica_states(xy, lab, states=["S1", "S2"], lag_ps=20.0,
                             timescales_ps=[85.0, 12.7], n_slow=n_slow)
        assert fig.data["used"] == [True, False]
        assert fig.data["axis_labels"][1] == ("TICA coordinate 2 (TICA timescale 12.7 ps):\n"
                                              "faster than the 20 ps lag, not used for the "
                                              "states")
        assert "slow coordinate 2" not in fig.svg
        assert "the states were clustered in the slow coordinate(s) alone" in fig.caption
    both = fg.tica_states(xy, lab, states=["S1", "S2"], lag_ps=20.0,
                          timescales_ps=[85.0, 31.0], n_slow=2)
    assert both.data["used"] == [True, True]
    assert both.data["axis_labels"][1] == ("slow coordinate 2 (dimensionless, kinetic map;\n"
                                           "timescale \u2265 31 ps, a lower bound)")
    assert "faster than the" not in both.caption


def test_funnel_writes_its_report_and_data_beside_out_with_the_positions_in_its_frame(
        host_guest, tmp_path, capsys):
    out = tmp_path / "site.json"
    assert _funnel(host_guest, out) == 0
    printed = capsys.readouterr().out
    assert f"wrote {tmp_path / 'site-report.html'}" in printed
    assert f"wrote {tmp_path / 'site-report-data.json'}" in printed
    page = (tmp_path / "site-report.html").read_text()
    assert "not available" not in page
    _parse(page)
    # rebuilt by 'cvdesign report' from the spec and its data alone: the same bytes
    (tmp_path / "site-report.html").unlink()
    assert main(["report", str(out)]) == 0
    assert (tmp_path / "site-report.html").read_text() == page
    doc = json.loads((tmp_path / "site-report-data.json").read_text())
    assert (doc["format"], doc["version"], doc["kind"], doc["spec"]) == (
        "cvdesign-report-data", 1, "funnel", "site.json")
    # the positions are those of the frames fitted onto the reference pocket
    z, r = _funnel_positions(out, host_guest.topology, host_guest.paths)
    np.testing.assert_allclose(doc["positions"]["z_nm"], z, atol=1e-5)
    np.testing.assert_allclose(doc["positions"]["r_nm"], r, atol=1e-5)
    (fig,) = _figures(out).values()
    spec = load_spec(out)
    (restraint,) = spec.restraints
    n = len(doc["positions"]["z_nm"])
    assert fig.data["n_positions"] == n == 2 * 60
    assert fig.data["inside"] == n  # every bound frame sits inside the funnel it sized
    assert min(z) > restraint["lower_wall_z_nm"] and max(z) < restraint["cone_end_z_nm"]
    for key in ("lower_wall_z_nm", "upper_wall_z_nm", "cone_end_z_nm", "cone_half_angle_rad",
                "cylinder_radius_nm"):
        assert fig.data["params"][key] == restraint[key]
    # --no-report: the spec and the data 'cvdesign report' draws from later
    assert _funnel(host_guest, tmp_path / "other.json", "--no-report") == 0
    assert not (tmp_path / "other-report.html").exists()
    assert (tmp_path / "other-report-data.json").read_bytes() == \
        (tmp_path / "site-report-data.json").read_bytes().replace(b"site.json", b"other.json")
    # without its data (an older output) the outline is drawn and the positions are not
    (tmp_path / "site-report-data.json").unlink()
    assert main(["report", str(out)]) == 0
    assert "not available: the ligand positions in the frame of the restraint" in \
        (tmp_path / "site-report.html").read_text()


def test_a_failing_funnel_report_leaves_the_spec_and_exits_2(host_guest, tmp_path, capsys,
                                                             monkeypatch):
    import cvdesign.report

    def fail(output):
        raise InputError("the disk is full")
    monkeypatch.setattr(cvdesign.report, "build_report", fail)
    out = tmp_path / "site.json"
    assert _funnel(host_guest, out) == 2
    captured = capsys.readouterr()
    assert re.search(r"cvdesign funnel: error: the spec was written, but the report could not "
                     r"be: the disk is full\. Run 'cvdesign report .*site\.json' once the "
                     r"cause is fixed", captured.err), captured.err
    assert "site-report.html" not in captured.out
    assert sorted(p.name for p in tmp_path.iterdir()) == ["site-report-data.json", "site.json"]
    assert load_spec(out).restraints


@pytest.mark.parametrize("change, message", [
    (lambda d: d.update(version=2),
     r"report-data\.json: version 2 of the report data; this cvdesign reads version 1"),
    (lambda d: d.update(kind="funnel"), r"report-data\.json: kind 'funnel', expected 'suggest'"),
    (lambda d: d.update(states=["closed", "ajar"]),
     r"report-data\.json: states \['closed', 'ajar'\] differ from those of ranking\.json"),
    (lambda d: d["cvs"][0]["heldout"].update(edges=d["cvs"][0]["heldout"]["edges"][::-1]),
     r"report-data\.json: a field is missing or malformed \(ValueError: held-out histogram "
     r"edges must be at least two increasing finite numbers\)"),
    (lambda d: d["cvs"][0]["traces"][0].pop("value"),
     r"report-data\.json: a field is missing or malformed \(KeyError: 'value'\)"),
], ids=["version", "kind", "states", "edges", "trace-without-values"])
def test_bad_report_data_is_refused_naming_the_file_and_nothing_is_written(
        demo_out, tmp_path, change, message):
    out = tmp_path / "out"
    shutil.copytree(demo_out, out)
    (out / "report.html").unlink(missing_ok=True)
    doc = json.loads((out / "report-data.json").read_text())
    change(doc)
    (out / "report-data.json").write_text(json.dumps(doc))
    before = sorted(p.name for p in out.iterdir())
    with pytest.raises(InputError, match=message):
        write_report(out)
    assert sorted(p.name for p in out.iterdir()) == before


def test_write_report_refuses_what_is_not_a_cvdesign_output(tmp_path, demo_out):
    (tmp_path / "mine").mkdir()
    (tmp_path / "mine" / "notes.txt").write_text("x")
    with pytest.raises(InputError, match=r"'.*mine' is not a cvdesign output directory: it has "
                                         r"no ranking\.json"):
        write_report(tmp_path / "mine")
    with pytest.raises(InputError, match=r"would replace ranking\.json, a file of the output"):
        write_report(demo_out, demo_out / "ranking.json")
    assert sorted(p.name for p in (tmp_path / "mine").iterdir()) == ["notes.txt"]


# ------------------------------------------------------------------------ in a browser
#: Headless Chromium without network: the background services would try to connect out.
CHROMIUM_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                  "--no-first-run", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync", "--hide-scrollbars")

_COUNT_IMAGES = ('<script>window.addEventListener("load", function () {'
                 "var imgs = Array.from(document.images);"
                 'document.body.setAttribute("data-images", imgs.length);'
                 'document.body.setAttribute("data-broken", imgs.filter(function (i) {'
                 "return !i.complete || i.naturalWidth === 0; }).length); });</script>")


def _chromium():
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    if Path("/usr/bin/chromium").exists():
        return "/usr/bin/chromium"
    pytest.skip("no Chromium browser here: install Debian's chromium package "
                "(apt-get install -y chromium; .ci/run does so when apt-get is available)")


def _browse(tmp_path, page, *args):
    import subprocess

    profile = Path(tempfile.mkdtemp(dir=tmp_path, prefix="profile-"))  # a new, empty one
    res = subprocess.run([_chromium(), *CHROMIUM_FLAGS, f"--user-data-dir={profile}", *args,
                          page.resolve().as_uri()], capture_output=True, text=True,
                         timeout=300, cwd=tmp_path)
    assert res.returncode == 0, res.stderr[-2000:]
    return res.stdout


def _body_attributes(tmp_path, text, name, script, *attributes):
    """The values of `attributes` that `script`, added to the page, sets on its body once
    Chromium has loaded it (DOM dump), unescaped."""
    import html as html_lib

    page = tmp_path / name
    page.write_text(text.replace("</body>", script + "</body>"), encoding="utf-8")
    dom = _browse(tmp_path, page, "--dump-dom")
    found = [re.search(rf'{a}="([^"]*)"', dom) for a in attributes]
    assert all(found), dom[:500]
    return [html_lib.unescape(m.group(1)) for m in found]


def _loaded_images(tmp_path, text, name):
    """(images, broken) that Chromium counts in `text` once loaded (DOM dump)."""
    images, broken = _body_attributes(tmp_path, text, name, _COUNT_IMAGES, "data-images",
                                      "data-broken")
    return int(images), int(broken)


def _screenshot(tmp_path, page, name):
    from matplotlib.image import imread

    shot = tmp_path / name
    _browse(tmp_path, page, f"--screenshot={shot}", "--window-size=1100,2600")
    return (imread(shot)[..., :3] * 255).round().astype(int)


def _pixels_of(image, hex_color, tol=12):
    rgb = np.array([int(hex_color[i:i + 2], 16) for i in (1, 3, 5)])
    return int(np.sum(np.all(np.abs(image - rgb) <= tol, axis=-1)))


def test_report_renders_in_headless_chromium_with_every_image_loaded(demo_out, tmp_path):
    _chromium()
    text = write_report(demo_out).read_text(encoding="utf-8")
    n_figures = len(build_report(read_output(demo_out)).figures)
    assert _loaded_images(tmp_path, text, "counted.html") == (n_figures, 0)
    # the check can fail: an image that does not load is counted as broken
    broken = text.replace("</body>", '<img src="missing.png" alt="missing" /></body>')
    assert _loaded_images(tmp_path, broken, "broken.html") == (n_figures + 1, 1)
    # a screenshot: not blank, and the figures' state colours are drawn (a render of the same
    # page without its images shows only the two small colour swatches of the title line)
    page = tmp_path / "report.html"
    page.write_text(text, encoding="utf-8")
    full = _screenshot(tmp_path, page, "full.png")
    bare_page = tmp_path / "bare.html"
    bare_page.write_text(re.sub(r'<img src="data:[^"]*" alt="[^"]*" />', "", text),
                         encoding="utf-8")
    bare = _screenshot(tmp_path, bare_page, "bare.png")
    assert full.shape == bare.shape == (2600, 1100, 3)
    not_white = np.any(full < 245, axis=-1).mean()
    assert not_white > 0.05, not_white
    for color in fg.state_colors(["closed", "open"]).values():
        assert _pixels_of(full, color) > _pixels_of(bare, color) + 500, color


def test_held_out_weight_beyond_the_bins_is_named_in_the_caption_not_rounded_away():
    # biased runs: the frames beyond the drawn range are a sum of weights (here 0.3 and 0.4
    # of a frame), which rounding to whole frames would have dropped without a word
    heldout = {"edges": [0.0, 1.0, 2.0, 3.0], "counts": {"A": [3.1, 1.0, 0.0],
                                                         "B": [0.0, 1.2, 2.5]},
               "outside": {"A": [0.2, 0.1], "B": [0.4, 0.0]}}
    stats = {"A": {"mean": 0.9, "std": 0.5}, "B": {"mean": 2.1, "std": 0.5}}
    fig = fg.cv_distributions("cv-01", "rank 1", heldout, stats, states=["A", "B"],
                              temperature_k=300.0)
    assert fig.data["outside"] == {"A": 0.3, "B": 0.4}
    assert fig.data["counts"] == {"A": 4.1, "B": 3.7}
    assert ("Held-out weight 0.7 beyond the drawn range is not shown (A: 0.3, B: 0.4; frames "
            "of biased runs count with their reweighting factors, which average 1 per frame of "
            "the state, so this is a weight, not a frame count).") in fig.caption
    assert "frame(s) beyond" not in fig.caption
    whole = dict(heldout, counts={"A": [3, 1, 0], "B": [0, 1, 3]},
                 outside={"A": [1, 0], "B": [0, 0]})
    fig = fg.cv_distributions("cv-01", "rank 1", whole, stats, states=["A", "B"],
                              temperature_k=300.0)
    assert fig.data["outside"] == {"A": 1, "B": 0}
    assert "1 held-out frame(s) beyond the drawn range are not shown (A: 1)." in fig.caption
    assert "weight" not in fig.caption


def test_held_out_weight_of_a_weighted_state_is_a_weight_even_when_it_sums_to_whole_frames():
    # report-data lists the states with biased runs in heldout.weighted: their outside sums
    # (here 1.0 and 2.0, written as ints) are weights, the unweighted state's are frames
    heldout = {"edges": [0.0, 1.0, 2.0, 3.0], "counts": {"A": [3, 1, 0], "B": [0, 1, 3]},
               "outside": {"A": [1, 0], "B": [2, 0]}, "weighted": ["B"]}
    stats = {"A": {"mean": 0.9, "std": 0.5}, "B": {"mean": 2.1, "std": 0.5}}
    fig = fg.cv_distributions("cv-01", "rank 1", heldout, stats, states=["A", "B"],
                              temperature_k=300.0)
    assert "1 held-out frame(s) beyond the drawn range are not shown (A: 1)." in fig.caption
    assert " Held-out weight 2 beyond the drawn range is not shown (B: 2; frames of biased " \
        "runs count with their reweighting factors" in fig.caption


def test_the_folded_note_under_a_range_is_drawn_in_the_warning_colour(demo_out, tmp_path):
    # the note is a small interval line (span.ci, grey) that is also a warning: the warning
    # colour must win, as it does for the other warnings of the page
    _chromium()
    text = write_report(demo_out).read_text(encoding="utf-8")
    assert '<span class="ci warning">folded: ' in text
    script = ("<script>const s = document.querySelector('span.ci.warning');"
              "document.body.setAttribute('data-color', getComputedStyle(s).color);</script>")
    (color,) = _body_attributes(tmp_path, text, "folded.html", script, "data-color")
    assert color == "rgb(138, 58, 0)"  # .warning's #8a3a00


# ------------------------------------------------------------------- the CV's range
def test_report_shows_each_cvs_ranges_and_folded_states_in_tables_and_figures(demo_out):
    report = build_report(read_output(demo_out))
    figs = {f.name: f for f in report.figures}
    ranking = json.loads((demo_out / "ranking.json").read_text())["ranking"]
    _, tags = _parse(report.html)
    kinds = set()
    for r in ranking:
        stem = Path(r["spec"]).stem
        spec = load_spec(demo_out / r["spec"])
        reach, at = spec.reachable_range, spec.states_at_bound
        for which in ("distributions", "traces"):
            data = figs[f"{stem}-{which}"].data
            assert data["reachable"] == list(reach) and data["at_bound"] == at
            # a bound is drawn where it lies near the values drawn, and only there
            assert set(data["bounds_drawn"]) <= {s for s, x in zip(("lower", "upper"), reach)
                                                 if x is not None}
            caption = figs[f"{stem}-{which}"].caption
            assert "Reachable range of the CV (from its terms): [" in caption
            assert ("Folded: " in caption) == bool(at)
        low = "-inf" if reach[0] is None else f"{reach[0]:.4g}"
        high = "+inf" if reach[1] is None else f"{reach[1]:.4g}"
        assert f'<p class="range">Range (CV units): reachable [{low}, {high}]' in report.html
        if at:  # the latch torsion's cos and sin: both states at an end, drawn and named
            kinds.add("folded")
            assert at == {"closed": "lower", "open": "upper"}
            dist = figs[f"{stem}-distributions"]
            assert dist.data["bounds_drawn"] == {"lower": reach[0], "upper": reach[1]}
            assert figs[f"{stem}-traces"].data["bounds_drawn"] == dist.data["bounds_drawn"]
            assert "closed sits at the lower bound" in dist.caption
            assert "folded: closed at the lower bound" in report.html
            assert "<td>lower (folded)</td>" in report.html
            assert "closed (held-out; at the lower bound)" in dist.svg  # the legend
        elif reach[1] is None:  # a distance: no largest value, no fold
            kinds.add("linear")
            assert f"reachable [{low}, +inf] (from the terms); observed [" in report.html
            assert "unbounded]" in figs[f"{stem}-distributions"].caption
            assert "upper" not in figs[f"{stem}-distributions"].data["bounds_drawn"]
    assert kinds == {"folded", "linear"}
    # the ranking table has the range column, one cell per CV
    header = report.html.split('<table class="ranking">', 1)[1].split("</thead>", 1)[0]
    assert header.endswith("<th>reachable range (CV units)</th></tr>")


def test_range_figures_draw_near_bounds_and_name_far_ones_in_the_caption():
    heldout = {"edges": [0.0, 1.0, 2.0, 3.0], "counts": {"A": [3, 1, 0], "B": [0, 1, 3]}}
    stats = {"A": {"mean": 0.9, "std": 0.5}, "B": {"mean": 2.1, "std": 0.5}}
    near = fg.cv_distributions("d", "rank 1", heldout, stats, states=["A", "B"],
                               temperature_k=300.0, reachable=(-0.2, 40.0))
    # -0.2 lies within a quarter of the drawn span (3) of it, 40 does not
    assert near.data["bounds_drawn"] == {"lower": -0.2}
    assert "upper 40 lies beyond the drawn range" in near.caption
    plain = fg.cv_distributions("d", "rank 1", heldout, stats, states=["A", "B"],
                                temperature_k=300.0)
    assert plain.data["reachable"] is None and "Reachable" not in plain.caption
    assert plain.svg.count("stroke-dasharray") < near.svg.count("stroke-dasharray")
    traces = [{"file": "a.xtc", "frame": [0, 1, 2], "time_ps": None, "value": [0.9, 0.95, -0.9],
               "state": ["B", "B", "A"]}]
    tr = fg.cv_traces("t", "rank 1", traces, states=["A", "B"], reachable=(-1.0, 1.0),
                      at_bound={"B": "upper"})
    assert tr.data["bounds_drawn"] == {"lower": -1.0, "upper": 1.0}
    assert "B sits at the upper bound" in tr.caption and "B (at the upper bound)" in tr.svg
    with pytest.raises(ValueError, match="at_bound: 'C'"):
        fg.cv_traces("t", "rank 1", traces, states=["A", "B"], at_bound={"C": "upper"})
    with pytest.raises(ValueError, match="finite numbers or None"):
        fg.cv_traces("t", "rank 1", traces, states=["A", "B"], reachable=(float("nan"), 1.0))


_RANGE_CELLS = ('<script>window.addEventListener("load", function () {'
                'var rows = Array.from(document.querySelectorAll("table.ranking tbody tr"));'
                'document.body.setAttribute("data-ranges", JSON.stringify(rows.map('
                "function (tr) { return tr.lastElementChild.innerText; })));"
                'var ranges = Array.from(document.querySelectorAll("p.range"));'
                'document.body.setAttribute("data-range-lines", JSON.stringify(ranges.map('
                "function (p) { return p.innerText; }))); });</script>")


def _rendered_ranges(tmp_path, text, name):
    """The ranking table's range cells and the ranges paragraphs as Chromium renders them
    (innerText: what is shown, without what CSS hides)."""
    cells, lines = _body_attributes(tmp_path, text, name, _RANGE_CELLS, "data-ranges",
                                    "data-range-lines")
    return json.loads(cells), json.loads(lines)


def test_chromium_shows_the_folded_flag_and_the_unbounded_range(demo_out, tmp_path):
    _chromium()
    text = write_report(demo_out).read_text(encoding="utf-8")
    ranking = json.loads((demo_out / "ranking.json").read_text())["ranking"]
    cells, lines = _rendered_ranges(tmp_path, text, "ranges.html")
    assert len(cells) == len(lines) == len(ranking)
    for r, cell, line in zip(ranking, cells, lines):
        spec = load_spec(demo_out / r["spec"])
        if spec.states_at_bound:
            assert "folded: closed at the lower bound" in cell
            assert "folded: open at the upper bound" in cell and "folded" in line
        else:
            assert "folded" not in cell and "folded" not in line
        if spec.reachable_range[1] is None:
            assert cell.startswith("[") and cell.endswith(", +inf]"), cell
    assert any("folded" in c for c in cells) and any(c.endswith("+inf]") for c in cells)
    # the check can fail: the same page with the flag hidden by a style shows no flag
    hidden = text.replace("</style>", ".warning { display: none !important; }</style>")
    cells, _ = _rendered_ranges(tmp_path, hidden, "hidden.html")
    assert not any("folded" in c for c in cells)


def test_the_within_runs_panel_keeps_each_cvs_style_and_legend_entry():
    """A CV whose within-run curve is all undefined is left out of the right panel, and the
    next CV keeps its own style there (it had taken the first one, under the first CV's
    legend entry: review); a within-run curve of a CV not drawn on the left is not drawn."""
    from cvdesign.report import figures as fg

    lags = [1.0, 2.0, 4.0]
    curves = [("rank 1", lags, [50.0, 52.0, 53.0]), ("rank 2", lags, [20.0, 21.0, None])]
    within = [("rank 1", lags, [None, None, None]), ("rank 2", lags, [0.8, 0.9, None]),
              ("rank 9", lags, [0.1, 0.2, 0.3])]
    fig = fg.implied_timescales(curves, within=within)
    assert list(fig.data["within"]) == ["rank 1", "rank 2"]

    class Axes:  # what the panel draws, by label
        def __init__(self):
            self.lines = {}

        def plot(self, x, y, **kw):
            self.lines[kw["label"]] = (kw["color"], kw["ls"], kw["marker"])

    styles = {lab: st for (lab, _, _), st in zip(curves, fg._CV_STYLES)}
    right = Axes()
    fg._timescale_curves(right, within[1:], styles)
    assert right.lines == {"rank 2": tuple(fg._CV_STYLES[1])}
    none = fg.implied_timescales(curves, within=[("rank 1", lags, [None] * 3)])
    assert none.data["within"] is None


# ------------------------------------------------- review 24: what the page claims and shows
def _with_report_data(src, dst, change):
    """A copy of the output `src` at `dst` whose report-data.json `change` (a function of the
    parsed document) has edited."""
    shutil.copytree(src, dst)
    path = dst / "report-data.json"
    data = json.loads(path.read_text())
    change(data)
    path.write_text(json.dumps(data))
    return dst


def _unresolved_tica(data):
    """The review's case: a first TICA timescale of 581 ps from runs of at most 90 ps."""
    data["tica"].update(timescales_ps=[581.0, data["tica"]["timescales_ps"][1]],
                        longest_run_ps=90.0, timescales_resolved=[False, True])


def test_a_tica_timescale_longer_than_the_runs_is_labelled_not_resolved_as_in_the_summary(
        runs_out, tmp_path):
    # The TICA axis read "timescale >= 581 ps, a lower bound" and the timescale figure drew
    # a cross "lower bounds on the true timescales" while the summary said "> 90 (not
    # resolved by these runs)": runs of 90 ps cannot show a 581 ps timescale.
    out = _with_report_data(runs_out["out"], tmp_path / "out", _unresolved_tica)
    figs = {f.name: f for f in build_report(read_output(out)).figures}
    tica = figs["tica-states"]
    assert tica.data["axis_labels"][0] == ("slow coordinate 1 (dimensionless, kinetic map;\n"
                                           "timescale > 90 ps, not resolved by these runs)")
    assert "581" not in tica.data["axis_labels"][0] and tica.data["resolved"] == [False, True]
    assert "longer than the longest run (90 ps)" in tica.caption
    ts = figs["implied-timescales"]
    assert ts.data["longest_run_ps"] == 90.0 and ts.data["tica"]["resolved"] == [False, True]
    # the summary's words for it, in the caption and the alt text
    assert "> 90 (not resolved by these runs)" in ts.caption
    assert "> 90 (not resolved by these runs)" in ts.alt and "581" not in ts.alt
    assert "The dashed line is the longest run (90 ps)" in ts.caption
    assert "longest run (90 ps)" in ts.svg and "not resolved by these runs (&gt; 90 ps)" in ts.svg
    # the pipeline's own flags follow the summary's rule (runs_out: resolved, below 150 ps)
    data = json.loads((runs_out["out"] / "report-data.json").read_text())["tica"]
    summary = (runs_out["out"] / "summary.md").read_text()
    assert data["timescales_resolved"] == [True] * len(data["timescales_ps"])
    assert "(not resolved by these runs)" not in summary


def test_every_text_of_every_figure_lies_within_the_figure(demo_out, runs_out, tmp_path):
    # The TICA figure's vertical label ("slow coordinate 2 (dimensionless, kinetic map;
    # timescale >= 1.43 ps, a lower bound)") was cut off at both ends, the timescale figure's
    # legend ran past its sides with the longest-run entry.
    unresolved = _with_report_data(runs_out["out"], tmp_path / "out", _unresolved_tica)
    for out in (demo_out, runs_out["out"], unresolved):
        for fig in build_report(read_output(out)).figures:
            assert fig.text_outside == (), (out, fig.name, fig.text_outside)
    # the check can fail: the old one-line label of a 4.2-inch figure does not fit
    import matplotlib.figure

    mpl = matplotlib.figure.Figure(figsize=(5.4, 4.2), layout="constrained")
    ax = mpl.subplots()
    ax.set_ylabel("slow coordinate 2 (dimensionless, kinetic map; timescale \u2265 1.43 ps, "
                  "a lower bound)")
    with fg._style():
        fig = fg._finish(mpl, "long-label", "", "", {})
    assert fig.text_outside == (ax.get_ylabel(),)


def _section(text, ident):
    """The page from the heading with `ident` to the next heading of its level or above."""
    start = text.index(f' id="{ident}">')
    level = text[text.rindex("<h", 0, start) + 2]
    ends = [text.find(f"<h{k}", start) for k in range(2, int(level) + 1)]
    ends = [e for e in ends if e >= 0]
    return text[start:min(ends) if ends else len(text)]


def test_each_ranked_cv_shows_its_bias_hints_and_their_warnings(demo_out):
    # The specs' hints.warnings (the demo's cv-01: a folded coordinate's kernel width, a
    # deposition interval set by the frame spacing) appeared nowhere on the page.
    text = write_report(demo_out).read_text(encoding="utf-8")
    ranking = json.loads((demo_out / "ranking.json").read_text())["ranking"]
    assert any(load_spec(demo_out / r["spec"]).hints.get("warnings") for r in ranking)
    for r in ranking:
        hints = load_spec(demo_out / r["spec"]).hints
        part = html.unescape(_section(text, Path(r["spec"]).stem))
        for w in hints.get("warnings") or []:
            assert f"Warning (bias hints): {w}" in re.sub(r"<[^>]+>", "", part)
        assert hints["caution"] in part
        table = part[part.index(f'id="{Path(r["spec"]).stem}-hints"'):]
        cells = re.findall(r"<td[^>]*>(.*?)</td>", table)
        assert cells[cells.index("kernel width (sigma)") + 1] == format(
            hints["kernel"]["sigma"], ".4g")
        assert cells[cells.index("kernel height (initial)") + 1] == format(
            hints["height_kj_mol"], ".4g")
        assert cells[cells.index("deposition interval") + 1] == format(
            hints["deposition"]["interval_ps"], ".4g")
        assert cells.index("bias factor (well-tempered)") and cells.index("walls")
    # the run has no summary warnings: no block for them
    assert 'id="run-warnings"' not in text


def test_the_summary_warnings_are_gathered_right_after_the_caution(runs_out, tmp_path):
    # Run-level warnings (states not metastable, hints refused, ...) were only deep in the
    # embedded summary. The summary writes them as "- **warning**: ..." (proposed states) and
    # "- warning: ..." (the ranking); a note of refused hints starts "bias hints refused".
    out = tmp_path / "out"
    shutil.copytree(runs_out["out"], out)
    summary = out / "summary.md"
    lines = ["- **warning**: state S1 is not metastable at lag 1 ps: it looks like a piece\n"
             "  of a random walk",
             "- warning: the lag is short for rescaled time",
             "- bias hints refused for cv-02.json: no state has a spread along it",
             "- a plain note, not a warning"]
    summary.write_text(summary.read_text() + "\n" + "\n".join(lines) + "\n")
    text = build_report(read_output(out)).html
    _parse(text)  # well-formed XML still
    caution = text.index('<p class="caution">')
    block = text.index('id="run-warnings"')
    assert caution < block < text.index("<nav>")
    shown = re.findall(r"<li>(.*?)</li>", text[block:text.index("</div>", block)])
    assert shown == ["state S1 is not metastable at lag 1 ps: it looks like a piece of a "
                     "random walk", "the lag is short for rescaled time",
                     "bias hints refused for cv-02.json: no state has a spread along it"]


@pytest.fixture(scope="module")
def three_slow_out(tmp_path_factory, three_states):
    """suggest --objective slow --bootstrap 0 on conftest's three-state toy (five atoms),
    written to a directory with its report."""
    top, files = three_states
    out = tmp_path_factory.mktemp("three-slow") / "out"
    assert main(["suggest", "--topology", top, *[
        a for s, fs in files.items() for a in ("--state", s, *fs)], "--objective", "slow",
        "--lag", "2", "--bootstrap", "0", "--suggestions", "2", "--max-terms", "1",
        "--kinds", "distance", "--out", str(out), "--quiet"]) == 0
    return out


def _ranking_rows(text):
    table = text[text.index('<table class="ranking">'):]
    table = table[:table.index("</table>")]
    header = re.findall(r"<th>(.*?)</th>", table)
    rows = [re.findall(r"<td[^>]*>(.*?)</td>", row)
            for row in re.findall(r"<tr>(.*?)</tr>", table)[1:]]
    return header, rows


def test_the_score_the_ranking_is_ordered_by_has_its_own_column(three_slow_out, demo_out):
    text = (three_slow_out / "report.html").read_text(encoding="utf-8")
    ranking = json.loads((three_slow_out / "ranking.json").read_text())["ranking"]
    header, rows = _ranking_rows(text)
    col = header.index("held-out slow score (ranked by)")
    assert [row[col] for row in rows] == [format(r["heldout_score"], ".3g") for r in ranking]
    assert "by the held-out slow score (the cross-validated VAMP-2 score" in text
    # objective separate ranks on J, already a column: no score column
    header, _ = _ranking_rows((demo_out / "report.html").read_text(encoding="utf-8"))
    assert not any("score" in h for h in header)


def test_what_was_not_measured_reads_n_a_and_no_interval_is_described(three_slow_out,
                                                                      demo_out):
    text = (three_slow_out / "report.html").read_text(encoding="utf-8")
    _parse(text)
    header, rows = _ranking_rows(text)
    assert "Brackets: nominal 95 %" not in text and "No intervals: this run computed no " \
        "bootstrap intervals" in text
    assert header[2] == "descriptors (weight)"
    refits = header.index("found again in refits")
    assert all(row[refits] == "n/a (no bootstrap refits)" for row in rows)
    assert all(cell != "" for row in rows for cell in row)
    figs = {f.name: f for f in build_report(read_output(three_slow_out)).figures}
    weights = figs["cv-01-weights"]
    assert "nominal 95 % bootstrap interval" not in weights.svg
    assert "weights (no intervals: no bootstrap)" in weights.svg
    assert "nominal 95 %" not in weights.alt
    # with a bootstrap, the intervals are there and described
    demo = (demo_out / "report.html").read_text(encoding="utf-8")
    assert "Brackets: nominal 95 %" in demo
    demo_figs = {f.name: f for f in build_report(read_output(demo_out)).figures}
    assert "weights (black: nominal 95 % bootstrap interval)" in demo_figs["cv-01-weights"].svg
    # a ranking entry without slowness (no lag): n/a with the reason, not an empty cell
    out = three_slow_out.parent / "nolag"
    shutil.copytree(three_slow_out, out)
    path = out / "ranking.json"
    doc = json.loads(path.read_text())
    doc["lag_ps"] = None
    for r in doc["ranking"]:
        for key in ("heldout_autocorrelation", "timescale_ps"):
            r[key] = None
    path.write_text(json.dumps(doc))
    header, rows = _ranking_rows(build_report(read_output(out)).html)
    rho, ts = header.index("autocorr."), header.index("timescale (ps)")
    assert all(row[rho] == row[ts] == "n/a (no lag)" for row in rows)


def test_with_three_states_the_overlap_column_says_it_is_the_closest_pair(three_slow_out,
                                                                          demo_out):
    text = (three_slow_out / "report.html").read_text(encoding="utf-8")
    header, _ = _ranking_rows(text)
    assert "overlap (closest pair)" in header
    assert "the overlapping coefficient of the two states that overlap most along the CV" \
        in text
    two = (demo_out / "report.html").read_text(encoding="utf-8")
    assert "overlap (closest pair)" not in two and "two states that overlap most" not in two


def test_biased_runs_say_rescaled_time_and_why_panels_and_frames_are_left_out(runs_out,
                                                                              tmp_path):
    def biased(data):
        for cv in data["cvs"]:
            cv["heldout"]["weighted"] = list(data["states"])
            cv["timescales"]["timescale_within_runs_ps"] = None  # as for biased runs
            # frames in no state (between the states) are not in the trace
            tr = cv["traces"][0]
            for key in ("frame", "value", "state") + (("time_ps",) if tr.get("time_ps")
                                                       else ()):
                tr[key] = tr[key][:40] + tr[key][60:]

    out = _with_report_data(runs_out["out"], tmp_path / "out", biased)
    report = build_report(read_output(out))
    header, _ = _ranking_rows(report.html)
    assert "autocorr. at 1 ps (rescaled time)" in header and "timescale (ps, rescaled time)" \
        in header
    figs = {f.name: f for f in report.figures}
    ts = figs["implied-timescales"]
    assert ts.data["within"] is None
    assert "No panel within runs: its lags are frames times the time step" in ts.caption
    traces = figs["cv-01-traces"]
    assert traces.data["gaps"] is True and "Frames in no state" in traces.caption
    # unbiased: none of these words
    plain = {f.name: f for f in build_report(read_output(runs_out["out"])).figures}
    assert "No panel within runs" not in plain["implied-timescales"].caption
    assert plain["cv-01-traces"].data["gaps"] is False
    assert "Frames in no state" not in plain["cv-01-traces"].caption


def test_the_alt_text_names_the_within_runs_curves_so():
    lags = [1.0, 2.0]
    fig = fg.implied_timescales([("rank 1", lags, [5.0, 6.0])],
                                within=[("rank 1", lags, [0.5, 0.6])])
    assert " Within runs: rank 1: 0.5 at 1, 0.6 at 2." in fig.alt
    assert "Within the states" not in fig.alt


def test_a_timescale_from_an_autocorrelation_indistinct_from_zero_is_a_bound_in_the_report(
        demo_out, tmp_path):
    # a review found the summary fixed ("< upper end") and the report still printing 0.174
    out = tmp_path / "out"
    shutil.copytree(demo_out, out)
    path = out / "ranking.json"
    doc = json.loads(path.read_text())
    doc["ranking"][0].update(timescale_ps=0.174, timescale_resolved=True,
                             timescale_ci_ps=[None, 0.61])
    path.write_text(json.dumps(doc))
    page = build_report(read_output(out)).html
    assert "&lt; 0.61 (autocorrelation at the lag not distinguished from 0)" in page
