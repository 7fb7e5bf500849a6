"""Tests of cvdesign.bias.funnel: geometry, sizing margins, energy and gradient."""

import json

import numpy as np
import pytest

from cvdesign.errors import InputError
from cvdesign.bias.funnel import (CAUTION, SHAPE_KEYS, FunnelStats, funnel_axis, funnel_energy,
                                  funnel_radius, funnel_reach, plot_funnel, project_on_axis,
                                  size_funnel)

PARAMS = dict(axis=[0.0, 0.6, 0.8], lower_wall_z_nm=-0.4, upper_wall_z_nm=2.5, cone_end_z_nm=0.9,
              cone_half_angle_rad=0.7, cylinder_radius_nm=0.35, blend_half_width_nm=0.1)


def _bound_frames(seed=0, n=300):
    rng = np.random.default_rng(seed)
    ring = np.array([[np.cos(t), np.sin(t), 0.0] for t in np.linspace(0, 2 * np.pi, 8,
                                                                        endpoint=False)])
    pocket = ring[None] + rng.normal(0, 0.02, size=(n, 8, 3))
    centre = rng.normal([0.0, 0.0, 0.25], [0.08, 0.08, 0.05], size=(n, 1, 3))
    ligand = centre + np.array([[-0.1, 0, 0], [0.1, 0, 0]])[None]
    return pocket, ligand


def test_project_on_axis_matches_hand_computed_points():
    z, r = project_on_axis([[0, 0, 2.0], [3.0, 4.0, -1.0], [1.0, 1.0, 1.0]],
                           [0, 0, 0], [0, 0, 2.0])
    np.testing.assert_allclose(z, [2.0, -1.0, 1.0])
    np.testing.assert_allclose(r, [0.0, 5.0, np.sqrt(2.0)])


def test_axis_through_exit_point_is_exact():
    a, rule = funnel_axis([1.0, 1.0, 1.0], exit_point=[1.0, 4.0, 5.0])
    assert rule == "exit_point"
    np.testing.assert_allclose(a, [0.0, 0.6, 0.8], atol=1e-15)


@pytest.mark.parametrize("exit_point, message", [
    ([1.0, 1.0, 1.0], "lies 0.0000 nm from the pocket centre"),
    ([1.0, 1.0, 1.01], "lies 0.0100 nm from the pocket centre"),
    ([np.nan, 1.0, 1.0], "three finite coordinates"),
])
def test_axis_refuses_an_exit_point_at_the_pocket_centre_or_not_finite(exit_point, message):
    with pytest.raises(InputError, match=message):
        funnel_axis([1.0, 1.0, 1.0], exit_point=exit_point)


def test_axis_falls_back_to_pocket_shape_when_ligand_is_centred():
    ring = np.array([[np.cos(t), np.sin(t), 0.0] for t in np.linspace(0, 6, 7)])
    a, rule = funnel_axis([0, 0, 0], ligand_centers=[[0, 0, 0.01]], pocket_xyz=ring)
    assert rule == "pocket_shape"
    np.testing.assert_allclose(a, [0, 0, 1.0], atol=1e-12)
    with pytest.raises(ValueError, match="give exit_point or pocket_xyz"):
        funnel_axis([0, 0, 0], ligand_centers=[[0, 0, 0.01]])


def test_streaming_stats_equal_one_shot():
    rng = np.random.default_rng(1)
    pts = rng.normal(size=(100, 3))
    one = FunnelStats([0, 0, 0], [0, 0, 1]).update(pts)
    many = FunnelStats([0, 0, 0], [0, 0, 1])
    for k in range(0, 100, 13):
        many.update(pts[k:k + 13])
    assert one.envelope == many.envelope and one.r_hist == many.r_hist
    assert one.cells == many.cells and sum(one.cells.values()) == 100
    assert np.isclose(one.z_std, many.z_std, rtol=1e-12)
    assert np.isclose(one.distance_std, many.distance_std, rtol=1e-12)
    z, r = project_on_axis(pts, [0, 0, 0], [0, 0, 1])
    assert np.isclose(one.z_std, z.std()) and one.r_max == r.max() and one.z_min == z.min()
    assert np.isclose(one.distance_mean, np.linalg.norm(pts, axis=1).mean(), rtol=1e-12)


def test_sizing_puts_every_bound_position_inside_with_margin():
    pocket, ligand = _bound_frames()
    out = size_funnel(pocket, ligand)
    out = json.loads(json.dumps(out))                    # JSON-ready
    p, m = out["params"], out["margins"]
    assert out["caution"] == CAUTION and out["axis_rule"] == "ligand_offset"
    assert set(p) == {"axis", *SHAPE_KEYS}
    # the ring hardly moves, so the fitted vectors are the raw ones to within the noise
    d = ligand.mean(axis=1) - pocket.mean(axis=1)
    z, r = project_on_axis(d, [0, 0, 0], p["axis"])
    R, _ = funnel_radius(z, p)
    assert np.all(R - r >= m["r_nm"] - 0.01)
    assert np.all(z - p["lower_wall_z_nm"] >= m["z_nm"] - 0.01)
    assert np.all(p["cone_end_z_nm"] - p["blend_half_width_nm"] - z >= m["z_nm"] - 0.01)
    assert "reference pocket" in out["reasoning"][0] and "hold the pocket" in out["reasoning"][0]
    assert out["warnings"] == []
    np.testing.assert_allclose(out["reference_pocket_nm"],
                               pocket[0] - pocket[0].mean(axis=0), atol=1e-12)


def test_sizing_from_chunks_matches_arrays():
    pocket, ligand = _bound_frames()
    whole = size_funnel(pocket, ligand)
    chunks = [(pocket[k:k + 64], ligand[k:k + 64]) for k in range(0, len(pocket), 64)]
    parts = size_funnel(chunks=chunks)
    for key in SHAPE_KEYS:
        assert np.isclose(whole["params"][key], parts["params"][key], rtol=1e-12)
    assert whole["density"] == parts["density"]


def test_integer_weights_size_the_funnel_as_repeated_frames():
    # A frame of weight 2 counts as that frame twice in every weighted statistic (axis,
    # means and standard deviations behind the margins, the density, the mean fit RMSD);
    # the extremes the funnel must clear are over the same frames either way (every weight
    # at least 1: a frame of weight 0 still counts there, see the next test). (Exact
    # identity of the weighted estimators, Kish 1965, "Survey Sampling".)
    pocket, ligand = _bound_frames(seed=3, n=120)
    counts = np.random.default_rng(4).integers(1, 4, size=len(pocket))
    weighted = size_funnel(pocket, ligand, weights=counts)
    rows = np.repeat(np.arange(len(pocket)), counts)
    repeated = size_funnel(pocket[rows], ligand[rows])
    for key in SHAPE_KEYS:
        assert weighted["params"][key] == pytest.approx(repeated["params"][key], rel=1e-10)
    np.testing.assert_allclose(weighted["params"]["axis"], repeated["params"]["axis"],
                               rtol=1e-10)
    for key in ("z_mean_nm", "z_std_nm", "r_std_nm", "center_distance_mean_nm",
                "center_distance_std_nm", "pocket_fit_rmsd_mean_nm", "z_min_nm", "z_max_nm",
                "r_max_nm"):
        assert weighted["observed"][key] == pytest.approx(repeated["observed"][key],
                                                          rel=1e-10, abs=1e-12), key
    ess = counts.sum() ** 2 / (counts ** 2).sum()
    assert weighted["observed"]["effective_sample_size"] == {"weights": pytest.approx(ess)}
    assert any("Kish effective sample size" in line for line in weighted["reasoning"])
    # weights of a different scale: the same funnel
    scaled = size_funnel(pocket, ligand, weights=1e-3 * counts)
    for key in SHAPE_KEYS:
        assert scaled["params"][key] == pytest.approx(weighted["params"][key], rel=1e-12)
    assert scaled["observed"]["pocket_fit_rmsd_mean_nm"] == pytest.approx(
        weighted["observed"]["pocket_fit_rmsd_mean_nm"], rel=1e-12)


def test_a_frame_of_weight_zero_still_bounds_the_funnel():
    # The lowest and highest z and the largest r in each z bin must be cleared whatever
    # the frame's weight: a frame moved far up, given weight 0, still sets z_max.
    pocket, ligand = _bound_frames(seed=5, n=120)
    ligand = ligand.copy()
    ligand[60] += [0.0, 0.0, 0.3]
    weights = np.ones(len(pocket))
    weights[60] = 0.0
    out = size_funnel(pocket, ligand, weights=weights)
    assert out["params"]["cone_end_z_nm"] > out["observed"]["z_max_nm"]
    dropped = size_funnel(np.delete(pocket, 60, axis=0), np.delete(ligand, 60, axis=0))
    assert out["observed"]["z_max_nm"] > dropped["observed"]["z_max_nm"] + 0.1


def test_weights_of_any_scale_and_one_dominant_frame():
    pocket, ligand = _bound_frames(seed=6, n=120)
    energies = np.random.default_rng(7).normal(0.0, 1.0, len(pocket))  # kJ/mol
    kt = 2.494  # kJ/mol at 300 K
    small = size_funnel(pocket, ligand, weights=np.exp(energies / kt))
    huge = size_funnel(pocket, ligand, weights=np.exp((energies + 900.0) / kt))  # ~1e157
    for key in SHAPE_KEYS:
        assert huge["params"][key] == pytest.approx(small["params"][key], rel=1e-9)
    assert np.isfinite(huge["observed"]["effective_sample_size"]["weights"])
    assert small["warnings"] == []
    dominant = np.full(len(pocket), 1e-9)
    dominant[3] = 1.0
    one = size_funnel(pocket, ligand, weights=dominant)
    assert any("small effective sample size of the weighted frames (1.0 of 120)" in w
               for w in one["warnings"])


@pytest.mark.parametrize("weights, message", [
    (np.ones(5), r"weights has shape \(5,\); give one weight per frame \(120 frames\)"),
    (np.full(120, -1.0), "weights must be finite and non-negative, not all zero"),
    (np.zeros(120), "weights must be finite and non-negative, not all zero"),
    (np.full(120, np.nan), "weights must be finite and non-negative, not all zero"),
    (np.array(["1"] * 120), "weights must be real numbers, one per frame; got <U1 values"),
    (np.ones(120) + 1j, "weights must be real numbers, one per frame; got complex128"),
])
def test_bad_weights_are_refused_naming_the_argument(weights, message):
    pocket, ligand = _bound_frames(n=120)
    with pytest.raises(InputError, match=message):
        size_funnel(pocket, ligand, weights=weights)
    with pytest.raises(InputError, match="weights= goes with the frames given as arrays"):
        size_funnel(chunks=[(pocket, ligand)], weights=np.ones(120))


@pytest.mark.parametrize("option, value, message", [
    ("bin_width", 0.0, r"bin_width=0.0 must be > 0"),  # bins of garbage, with numpy warnings
    ("blend_half_width", 0.0, r"blend_half_width=0.0 must be > 0"),  # a division by zero
    ("cylinder_pad", -1.0, r"cylinder_pad=-1.0 must be >= 0"),  # a negative radius
    ("unbound_length", -5.0, r"unbound_length=-5.0 must be > 0"),  # upper wall below lower
    ("k_std", -1.0, r"k_std=-1.0 must be > 0"),
    ("z_margin", np.nan, r"z_margin=nan must be finite"),
    ("min_half_angle", 2.0, r"min_half_angle=2.0 must lie between 0 and pi/2 rad"),
    ("ligand_radius", "wide", r"ligand_radius must be a number; got 'wide'"),
])
def test_sizing_options_that_give_no_funnel_are_refused_naming_the_option(option, value,
                                                                           message):
    pocket, ligand = _bound_frames(n=120)
    with pytest.raises(InputError, match=message):
        size_funnel(pocket, ligand, **{option: value})


def test_sizing_refuses_a_pocket_that_fixes_no_orientation():
    pocket, ligand = _bound_frames()
    line = np.zeros((len(pocket), 3, 3))
    line[:, :, 0] = [-0.5, 0.0, 0.5]
    with pytest.raises(InputError, match="does not fix an orientation in the first frame"):
        size_funnel(line, ligand)
    with pytest.raises(InputError, match="does not fix an orientation"):
        size_funnel(pocket[:, :2], ligand)


def test_sizing_refuses_nan_coordinates_naming_frame_and_atom():
    pocket, ligand = _bound_frames()
    ligand = ligand.copy()
    ligand[70, 1, 2] = np.nan
    chunks = [(pocket[k:k + 64], ligand[k:k + 64]) for k in range(0, len(pocket), 64)]
    with pytest.raises(InputError, match=r"ligand_xyz has NaN .* frame 70 \(counting all frames "
                                         r"given\), atom 1"):
        size_funnel(chunks=chunks)


def test_energy_zero_inside_positive_outside():
    a = np.array(PARAMS["axis"])
    inside = 0.3 * a
    outside = [inside + [1.5, 0, 0],        # beside the cone
               -1.0 * a,                    # below the lower wall
               3.0 * a]                     # above the upper wall
    e_in, g_in = funnel_energy(inside, PARAMS, 500.0)
    assert e_in == 0.0 and np.all(g_in == 0.0)
    e_out, _ = funnel_energy(np.array(outside), PARAMS, 500.0)
    assert np.all(e_out > 0.0)


def test_gradient_matches_finite_differences():
    rng = np.random.default_rng(2)
    a = np.array(PARAMS["axis"])
    pts = rng.uniform(-1.5, 3.0, size=(40, 1)) * a + rng.normal(0, 0.8, size=(40, 3))
    e, g = funnel_energy(pts, PARAMS, 800.0)
    assert np.count_nonzero(e > 0) > 10
    h = 1e-6
    fd = np.empty_like(g)
    for k in range(3):
        dx = np.zeros(3)
        dx[k] = h
        fd[:, k] = (funnel_energy(pts + dx, PARAMS, 800.0)[0]
                    - funnel_energy(pts - dx, PARAMS, 800.0)[0]) / (2 * h)
    scale = np.maximum(np.abs(g).max(axis=1, keepdims=True), 1.0)
    assert np.all(np.abs(fd - g) / scale < 1e-5)


@pytest.mark.parametrize("edge", [-1, 1])
def test_energy_and_gradient_continuous_at_cone_cylinder_junction(edge):
    a = np.array(PARAMS["axis"])
    perp = np.array([1.0, 0.0, 0.0])
    z0 = PARAMS["cone_end_z_nm"] + edge * PARAMS["blend_half_width_nm"]
    eps = 1e-9
    pts = np.array([(z0 - eps) * a + 0.9 * perp, (z0 + eps) * a + 0.9 * perp])
    e, g = funnel_energy(pts, PARAMS, 1000.0)
    assert e[0] > 0 and abs(e[0] - e[1]) < 1e-5
    np.testing.assert_allclose(g[0], g[1], atol=1e-4)


def test_reach_is_the_farthest_point_of_the_funnel_surface():
    # brute force over the outline: walls' rims and the radius profile
    reach, _ = funnel_reach(PARAMS)
    z = np.linspace(PARAMS["lower_wall_z_nm"], PARAMS["upper_wall_z_nm"], 20001)
    R, _ = funnel_radius(z, PARAMS)
    assert np.isclose(reach, np.hypot(z, R).max(), rtol=1e-9)
    steep = dict(PARAMS, lower_wall_z_nm=-2.0, upper_wall_z_nm=1.2)
    reach, where = funnel_reach(steep)
    z = np.linspace(-2.0, 1.2, 20001)
    assert where == "lower wall" and np.isclose(reach, np.hypot(z, funnel_radius(z, steep)[0]).max())


def test_plot_funnel_writes_png(tmp_path):
    pytest.importorskip("matplotlib")
    pocket, ligand = _bound_frames()
    out = size_funnel(pocket, ligand)
    path = plot_funnel(out, tmp_path / "funnel.png")
    assert open(path, "rb").read(8) == b"\x89PNG\r\n\x1a\n"
    assert [p.name for p in tmp_path.iterdir()] == ["funnel.png"]


def test_axis_uncertainty_is_the_standard_error_of_the_block_means_across_the_axis():
    # four equal blocks whose means lie 0.1 nm to either side of the axis, across it
    # (x) and along it (z, which does not count): the batch-means standard error
    # (Flyvbjerg and Petersen, J. Chem. Phys. 91, 461, 1989) is
    # sqrt(sum (1/4)^2 0.1^2 x 4/3) = 0.1 / sqrt(3)
    from cvdesign.bias.funnel import _axis_uncertainty

    blocks = {(0, b): (10.0, 10.0 * np.array([dx, 0.0, 0.5 + dz]))
              for b, (dx, dz) in enumerate([(0.1, 0.2), (-0.1, -0.2), (0.1, 0.0), (-0.1, 0.0)])}
    angle, note = _axis_uncertainty(blocks, np.array([0.0, 0.0, 1.0]), 0.5)
    assert angle == pytest.approx(np.arctan2(0.1 / np.sqrt(3.0), 0.5), rel=1e-12)
    assert "from 4 block means" in note
    assert _axis_uncertainty({(0, 0): (1.0, np.ones(3))}, np.array([0.0, 0.0, 1.0]), 0.5) \
        == (None, "")


def test_a_funnel_axis_through_a_noisy_ligand_offset_is_warned_about(tmp_path):
    # one run of 60 frames, the ligand 0.06 nm off the pocket centre along z and scattered
    # by 0.15 nm: the axis through its mean offset is set by noise (a review found axes of
    # halves of runs 17 to 35 degrees apart with a cone of 11.5 degrees, without a word)
    import mdtraj as md

    from cvdesign import Source
    from cvdesign.bias.funnel import size_funnel_from_source

    rng = np.random.default_rng(3)
    pocket, _ = _bound_frames(seed=3, n=60)
    centre = rng.normal([0.0, 0.0, 0.06], [0.15, 0.15, 0.05], size=(60, 1, 3))
    ligand = centre + np.array([[-0.1, 0, 0], [0.1, 0, 0]])[None]
    top = md.Topology()
    res = top.add_residue("HST", top.add_chain())
    for i in range(8):
        top.add_atom(f"C{i}", md.element.carbon, res)
    lig = top.add_residue("GST", top.chain(0))
    for i in range(2):
        top.add_atom(f"L{i}", md.element.carbon, lig)
    path = tmp_path / "bound.dcd"
    md.Trajectory(np.concatenate([pocket, ligand], axis=1).astype(np.float32), top) \
        .save_dcd(str(path))
    src = Source(top)
    src.add(str(path), "bound")
    out = size_funnel_from_source(src, np.arange(8), np.arange(8, 10))
    assert out["axis_rule"] == "ligand_offset"
    (warning,) = [w for w in out["warnings"] if "the axis through the mean ligand offset" in w]
    assert "the mean offset less than twice its standard error" in warning
    assert "95 % of such axes within about" in warning  # both reasons, as both hold
    assert "--exit-point" in warning
    assert any("uncertain by about" in r and "from 5 block means (5 per run)" in r
               for r in out["reasoning"])
    # the same frames as arrays: no runs to block, and the reasoning says it was not assessed
    arrays = size_funnel(pocket, ligand)
    assert arrays["axis_rule"] == "ligand_offset"
    assert any("its uncertainty not assessed: frames given as arrays" in r
               for r in arrays["reasoning"])


def test_the_axis_error_takes_the_runs_means_when_blocks_are_shorter_than_the_correlation():
    """Batch means (Flyvbjerg and Petersen 1989): two runs whose five blocks each sit at the
    run's own offset, +0.1 and -0.1 nm across the axis (blocks far shorter than the
    ligand's correlation). The ten block means give sqrt(10 (1/10)^2 0.01 x 10/9) = 0.0333
    nm, the two run means sqrt(2 (1/2)^2 0.01 x 2) = 0.1 nm, which is taken. Checked on the
    host-guest testbed (2 runs of 200 frames, 24 seeds, against the toy's known axis): the
    mean squared error over the mean squared reported error was 2.27 with blocks alone and
    1.13 with this rule; with 4 runs of 2000 frames 0.93 (6 seeds), none warned about."""
    from cvdesign.bias.funnel import AXIS_BLOCKS, _axis_uncertainty

    axis = np.array([0.0, 0.0, 1.0])
    blocks = {(run, b): (1.0, np.array([0.1 if run == 0 else -0.1, 0.0, 0.5]))
              for run in range(2) for b in range(AXIS_BLOCKS)}
    angle, note = _axis_uncertainty(blocks, axis, 0.5)
    assert np.tan(angle) * 0.5 == pytest.approx(0.1, rel=1e-12)
    assert "from the means of the 2 runs, larger than from 10 block means" in note
    # blocks that scatter within their runs and runs that agree: the blocks' error stands
    rng = np.random.default_rng(5)
    blocks = {(run, b): (1.0, np.array([*rng.normal(0.0, 0.1, 2), 0.5]))
              for run in range(2) for b in range(AXIS_BLOCKS)}
    means = [np.mean([blocks[(r, b)][1] for b in range(AXIS_BLOCKS)], axis=0) for r in (0, 1)]
    for r in (0, 1):  # shift each run's blocks so that both runs have the same mean
        for b in range(AXIS_BLOCKS):
            blocks[(r, b)] = (1.0, blocks[(r, b)][1] - means[r] + np.array([0, 0, 0.5]))
    angle, note = _axis_uncertainty(blocks, axis, 0.5)
    assert note.startswith("standard error") and "from 10 block means (5 per run)" in note
    assert "runs" not in note.split("(5 per run)")[1]
