"""Tests of cvdesign.bias.hints: kernels, bias factor, fill volume and fill times, suggestions, text."""

import json
import math
import re

import numpy as np
import pytest
from scipy import integrate

from cvdesign.bias.hints import (
    CAUTION,
    MAX_GRID_BINS,
    bias_factor_for_barrier,
    check_run_conditions,
    fill_time_metadynamics,
    fill_time_well_tempered,
    fill_volume,
    format_hints,
    gaussian_kernel,
    gaussian_kernel_derivative,
    kernel_area_per_height,
    lucy_cutoff_for_sigma,
    lucy_kernel,
    lucy_kernel_derivative,
    suggest_hints,
)
from cvdesign.constants import BOLTZMANN_KJ_MOL_K
from cvdesign.errors import InputError

T = 300.0
KT = BOLTZMANN_KJ_MOL_K * T

STATES = {
    "closed": {"mean": -1.2, "std": 0.15, "n_frames": 2000},
    "open": {"mean": 0.9, "std": 0.25, "n_frames": 1500},
}


# --------------------------------------------------------------------------
# kernels


@pytest.mark.parametrize("h", [0.3, 1.0, 2.5])
def test_lucy_kernel_integrates_to_one(h):
    value, _ = integrate.quad(lucy_kernel, -h, h, args=(h,), epsabs=1e-13)
    assert value == pytest.approx(1.0, abs=1e-10)


def test_lucy_normalization_constant_is_5_over_4h():
    # int_{-h}^{h} (1 + 3q)(1 - q)^3 dr = 4h/5, so the constant is 5/(4h)
    h = 1.7
    raw, _ = integrate.quad(lambda r: (1 + 3 * abs(r) / h) * (1 - abs(r) / h) ** 3, -h, h)
    assert raw == pytest.approx(4 * h / 5, rel=1e-12)
    assert lucy_kernel(0.0, h) == pytest.approx(5 / (4 * h), rel=1e-15)


def test_lucy_kernel_has_compact_support():
    h = 0.8
    assert lucy_kernel(h, h) == 0.0
    assert np.all(lucy_kernel(np.array([-5.0, -h - 1e-12, h + 1e-12, 3.0]), h) == 0.0)
    assert lucy_kernel(0.5 * h, h) > 0.0


@pytest.mark.parametrize("h", [0.5, 2.0])
def test_lucy_derivative_matches_finite_differences(h):
    r = np.linspace(-1.2 * h, 1.2 * h, 41)
    eps = 1e-6
    fd = (lucy_kernel(r + eps, h) - lucy_kernel(r - eps, h)) / (2 * eps)
    np.testing.assert_allclose(lucy_kernel_derivative(r, h), fd, atol=1e-7)


def test_lucy_derivative_is_continuous_at_cutoff_and_at_zero():
    h = 1.3
    for side in (1.0, -1.0):
        left = [lucy_kernel_derivative(side * (h - eps), h) for eps in (1e-2, 1e-4, 1e-6)]
        assert abs(left[-1]) < 1e-10  # limit from inside is 0
        assert abs(left[0]) > abs(left[1]) > abs(left[2])
        assert lucy_kernel_derivative(side * h, h) == 0.0
        assert lucy_kernel_derivative(side * (h + 1e-9), h) == 0.0
    # at 0: both one-sided limits are 0 (the kernel has a smooth maximum)
    assert abs(lucy_kernel_derivative(1e-9, h)) < 1e-7
    assert abs(lucy_kernel_derivative(-1e-9, h)) < 1e-7
    assert lucy_kernel_derivative(0.0, h) == 0.0


def test_lucy_cutoff_matches_gaussian_variance():
    sigma = 0.37
    h = lucy_cutoff_for_sigma(sigma)
    var, _ = integrate.quad(lambda r: r * r * lucy_kernel(r, h), -h, h)
    assert var == pytest.approx(sigma**2, rel=1e-10)
    assert h == pytest.approx(math.sqrt(21 / 2) * sigma, rel=1e-15)


@pytest.mark.parametrize("sigma", [0.05, 1.0, 3.0])
def test_gaussian_kernel_integrates_to_one(sigma):
    value, _ = integrate.quad(gaussian_kernel, -np.inf, np.inf, args=(sigma,))
    assert value == pytest.approx(1.0, abs=1e-10)
    var, _ = integrate.quad(lambda r: r * r * gaussian_kernel(r, sigma), -np.inf, np.inf)
    assert var == pytest.approx(sigma**2, rel=1e-8)


def test_gaussian_derivative_matches_finite_differences():
    r = np.linspace(-3.0, 3.0, 31)
    eps = 1e-6
    fd = (gaussian_kernel(r + eps, 0.7) - gaussian_kernel(r - eps, 0.7)) / (2 * eps)
    np.testing.assert_allclose(gaussian_kernel_derivative(r, 0.7), fd, atol=1e-8)


def test_kernels_return_float_for_scalar_and_array_for_array():
    assert isinstance(lucy_kernel(0.1, 1.0), float)
    assert isinstance(gaussian_kernel_derivative(0.1, 1.0), float)
    out = lucy_kernel([0.0, 0.5], 1.0)
    assert out.shape == (2,) and out.dtype == np.float64


@pytest.mark.parametrize("kernel,width", [("gaussian", 0.4), ("lucy", 1.1)])
def test_kernel_area_per_height_is_area_of_unit_peak(kernel, width):
    f = gaussian_kernel if kernel == "gaussian" else lucy_kernel
    peak = f(0.0, width)
    lim = np.inf if kernel == "gaussian" else width
    area, _ = integrate.quad(lambda r: f(r, width) / peak, -lim, lim)
    assert kernel_area_per_height(kernel, width) == pytest.approx(area, rel=1e-10)


# --------------------------------------------------------------------------
# bias factor


def test_bias_factor_hand_computed():
    # 60 kJ/mol at 300 K, 3 kT left: 60 / (3 * 0.00831446261815324 * 300) = 8.01816...
    assert bias_factor_for_barrier(60.0, 300.0) == pytest.approx(60.0 / (3 * 2.494338785445972), rel=1e-14)
    assert bias_factor_for_barrier(60.0, 300.0) == pytest.approx(8.01816, abs=1e-5)
    assert bias_factor_for_barrier(50.0, 350.0, target_barrier_kt=4.0) == pytest.approx(
        50.0 / (4 * 0.00831446261815324 * 350.0), rel=1e-14)


def test_bias_factor_is_floored_for_low_barriers():
    assert bias_factor_for_barrier(5.0, 300.0) == 2.0
    assert bias_factor_for_barrier(5.0, 300.0, minimum=1.0) == 1.0
    assert bias_factor_for_barrier(10.0, 300.0, minimum=1.0) == pytest.approx(10.0 / (3 * KT))
    with pytest.raises(InputError, match=r"minimum=0\.5 must be >= 1"):
        bias_factor_for_barrier(10.0, 300.0, minimum=0.5)


# --------------------------------------------------------------------------
# fill volume and times


@pytest.mark.parametrize("level,std", [(5.0, 0.2), (40.0, 1.0), (100.0, 0.05)])
def test_fill_volume_equals_quadrature(level, std):
    x_edge = std * math.sqrt(2 * level / KT)
    value, _ = integrate.quad(lambda s: max(level - KT * s * s / (2 * std * std), 0.0),
                              -2 * x_edge, 2 * x_edge, points=[-x_edge, x_edge], epsabs=1e-12)
    assert fill_volume(level, std, T) == pytest.approx(value, rel=1e-10)


def test_fill_time_metadynamics_scaling():
    kw = dict(temperature=T, area_per_height=0.25, interval_ps=1.0)
    t = fill_time_metadynamics(40.0, 0.3, height=1.0, **kw)
    assert fill_time_metadynamics(40.0, 0.3, height=2.0, **kw) == pytest.approx(t / 2, rel=1e-14)
    assert fill_time_metadynamics(160.0, 0.3, height=1.0, **kw) == pytest.approx(8 * t, rel=1e-14)  # L^1.5
    assert fill_time_metadynamics(40.0, 0.6, height=1.0, **kw) == pytest.approx(2 * t, rel=1e-14)


def test_fill_time_metadynamics_matches_running_minimum_filling():
    # Independent check: deposit Gaussian kernels on a grid, always at the lowest
    # point of F + V, until the lowest point reaches the level. Count them.
    std, width, height = 1.0, 0.1, 0.05 * KT
    x = np.linspace(-15.0, 15.0, 30001)
    free = KT * x**2 / (2 * std**2)
    area = kernel_area_per_height("gaussian", width)
    for level in (10.0, 20.0):
        bias = np.zeros_like(x)
        n = 0
        while True:
            i = np.argmin(free + bias)
            if free[i] + bias[i] >= level:
                break
            bias += height * np.exp(-((x - x[i]) ** 2) / (2 * width**2))
            n += 1
        t = fill_time_metadynamics(level, std, temperature=T, height=height, area_per_height=area,
                                   interval_ps=1.0)
        assert n == pytest.approx(t, rel=0.02)


def _mean_field_steps(level, gamma, *, std=1.0, width=0.2, height=0.1 * KT, dx=0.02):
    """Deterministic mean-field well-tempered run on a grid: each step adds the kernel
    convolved with the Boltzmann density on F + V times exp(-V / (kB dT)); steps until
    the bias at the basin bottom reaches (1 - 1/gamma) * level."""
    x = np.arange(-8.0, 8.0 + dx / 2, dx)
    free = KT * x**2 / (2 * std**2)
    m = int(round(5 * width / dx))
    kern = np.exp(-((np.arange(-m, m + 1) * dx) ** 2) / (2 * width**2))
    bias = np.zeros_like(x)
    mid = len(x) // 2
    n = 0
    while bias[mid] < (1 - 1 / gamma) * level:
        e = free + bias
        p = np.exp(-(e - e.min()) / KT)
        p /= p.sum()
        bias += height * np.convolve(p * np.exp(-bias / (KT * (gamma - 1))), kern, mode="same")
        n += 1
    return n


@pytest.mark.parametrize("level,gamma", [(10.0, 3.0), (20.0, 5.0), (20.0, 10.0)])
def test_fill_time_well_tempered_agrees_with_mean_field_filling(level, gamma):
    # The quasi-static model ignores bias spilling past the rim, so it runs a bit
    # fast; within 20% of the mean-field run at these settings (measured: 4-13%).
    area = kernel_area_per_height("gaussian", 0.2)
    t = fill_time_well_tempered(level, 1.0, temperature=T, height=0.1 * KT, area_per_height=area,
                                interval_ps=1.0, bias_factor=gamma)
    n = _mean_field_steps(level, gamma)
    assert n == pytest.approx(t, rel=0.2)


def test_fill_time_well_tempered_tends_to_plain_for_large_gamma():
    kw = dict(temperature=T, height=1.0, area_per_height=0.3, interval_ps=2.0)
    plain = fill_time_metadynamics(40.0, 0.5, **kw)
    assert fill_time_well_tempered(40.0, 0.5, bias_factor=1e7, **kw) == pytest.approx(plain, rel=1e-4)
    times = [fill_time_well_tempered(40.0, 0.5, bias_factor=g, **kw) for g in (2.0, 5.0, 20.0)]
    assert times[0] > times[1] > times[2] > plain


def test_fill_time_well_tempered_scales_with_height_and_std():
    kw = dict(temperature=T, area_per_height=0.3, interval_ps=1.0, bias_factor=6.0)
    t = fill_time_well_tempered(30.0, 0.5, height=1.0, **kw)
    assert fill_time_well_tempered(30.0, 0.5, height=2.0, **kw) == pytest.approx(t / 2, rel=1e-9)
    assert fill_time_well_tempered(30.0, 1.0, height=1.0, **kw) == pytest.approx(2 * t, rel=1e-9)
    assert fill_time_well_tempered(0.0, 1.0, height=1.0, **kw) == 0.0


def test_fill_time_well_tempered_overflow_is_inf():
    t = fill_time_well_tempered(5000.0, 1.0, temperature=T, height=1.0, area_per_height=1.0,
                                interval_ps=1.0, bias_factor=1.5)
    assert t == math.inf


# --------------------------------------------------------------------------
# suggest_hints


def _walk(obj):
    if isinstance(obj, dict):
        for v in obj.values():
            yield from _walk(v)
    elif isinstance(obj, list):
        for v in obj:
            yield from _walk(v)
    else:
        yield obj


def test_hints_on_sample_states_are_finite_and_sensible():
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, autocorrelation_time_ps=1.0, barrier=50.0)
    for v in _walk(h):
        assert v is None or isinstance(v, (bool, int, float, str))
        if isinstance(v, float):
            assert math.isfinite(v)
    assert h["caution"] == CAUTION and "starting points to validate" in CAUTION
    assert h["kernel"]["sigma"] == pytest.approx(0.5 * 0.15)
    assert h["kernel"]["reference_state"] == "closed"
    assert 0.1 <= h["height_kj_mol"] <= 3.0
    assert h["deposition"]["interval_steps"] == 500 and h["deposition"]["interval_ps"] == 1.0
    gamma = h["well_tempered"]["bias_factor"]
    assert gamma == pytest.approx(50.0 / (3 * KT))
    assert h["well_tempered"]["delta_t_k"] == pytest.approx((gamma - 1) * T)
    walls, grid = h["walls"], h["grid"]
    assert walls["lower"] == pytest.approx(-1.2 - 3 * 0.15)
    assert walls["upper"] == pytest.approx(0.9 + 3 * 0.25)
    assert grid["lower"] < walls["lower"] < walls["upper"] < grid["upper"]
    assert grid["spacing"] <= 0.2 * h["kernel"]["sigma"] + 1e-12
    assert grid["n_bins"] * grid["spacing"] == pytest.approx(grid["upper"] - grid["lower"])
    rows = h["fill_time"]["states"]
    assert set(rows) == set(STATES)
    for name, (row,) in rows.items():
        assert row["level_kj_mol"] == 50.0
        assert 0 < row["metadynamics_ps"] < row["well_tempered_ps"] < 1e7
        assert row["metadynamics_ns"] == pytest.approx(row["metadynamics_ps"] / 1000)
    # the wider basin takes longer to fill
    assert rows["open"][0]["metadynamics_ps"] > rows["closed"][0]["metadynamics_ps"]
    assert h["reasoning"] and all(isinstance(line, str) for line in h["reasoning"])


def test_hints_round_trip_through_json_without_nan():
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, kernel="lucy", budget_ns=0.5)
    assert json.loads(json.dumps(h, allow_nan=False)) == h


def test_hints_without_barrier_tabulate_bias_factor_and_fill_times():
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0)
    wt = h["well_tempered"]
    assert wt["bias_factor"] is None and wt["barrier_kj_mol"] is None
    assert [r["barrier_kj_mol"] for r in wt["table"]] == [20.0, 40.0, 60.0, 80.0, 100.0]
    gammas = [r["bias_factor"] for r in wt["table"]]
    assert gammas == sorted(gammas)
    for rows in h["fill_time"]["states"].values():
        assert [r["level_kj_mol"] for r in rows] == [20.0, 40.0, 60.0, 80.0, 100.0]
        assert [r["bias_factor"] for r in rows] == gammas
        times = [r["metadynamics_ps"] for r in rows]
        assert times == sorted(times)
    assert h["deposition"]["tau_ps"] == 1.0  # the default when no time is given


def test_lucy_hints_use_variance_matched_cutoff():
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, kernel="lucy", barrier=40.0)
    k = h["kernel"]
    assert k["cutoff"] == pytest.approx(lucy_cutoff_for_sigma(k["sigma"]))
    assert k["area_per_height"] == pytest.approx(0.8 * k["cutoff"])
    assert any("Lucy" in line for line in h["reasoning"])


def test_per_state_barriers_and_given_bias_factor():
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, barrier={"closed": 60.0, "open": 20.0},
                      bias_factor=10.0)
    assert h["well_tempered"]["bias_factor"] == 10.0
    assert h["well_tempered"]["barrier_kj_mol"] == 60.0
    assert h["fill_time"]["states"]["closed"][0]["level_kj_mol"] == 60.0
    assert h["fill_time"]["states"]["open"][0]["level_kj_mol"] == 20.0


def test_long_autocorrelation_time_is_capped_with_a_note():
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, autocorrelation_time_ps=250.0)
    assert h["deposition"]["capped"] is True
    assert h["deposition"]["interval_ps"] == 10.0
    assert any("capped" in line for line in h["reasoning"])
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, autocorrelation_time_ps=250.0,
                      max_interval_ps=None)
    assert h["deposition"]["interval_steps"] == 125000


def test_a_short_autocorrelation_time_is_lengthened_to_the_rate_the_hints_flag():
    """A time of 0.1 fs would give one MD step per kernel; the interval is lengthened so that
    the initial rate stays at 5 kJ/mol/ps, the rate the hints flag (common practice, from
    memory): 0.5 kT = 1.2472 kJ/mol at 300 K over 5 kJ/mol/ps = 0.2494 ps = 124.7 steps of 2 fs,
    so 125 steps, and no warning about the hints' own suggestion."""
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, autocorrelation_time_ps=0.0001)
    dep = h["deposition"]
    assert dep["interval_steps"] == 125 and dep["rate_limited"] is True
    assert dep["rate_kj_mol_ps"] == pytest.approx(0.5 * KT / 0.25, rel=1e-12)
    assert dep["rate_kj_mol_ps"] <= 5.0 and h["warnings"] == []
    (note,) = [line for line in h["reasoning"] if "lengthened to 125 steps" in line]
    assert note.startswith("Note: the interval from the autocorrelation time, 1 step (0.002 ps)")
    assert ("125 steps = 0.25 ps (lengthened: at most 5 kJ/mol per ps at first)"
            in format_hints(h))
    # a time that already gives a slow enough rate is not touched
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, autocorrelation_time_ps=1.0)
    assert h["deposition"]["interval_steps"] == 500 and h["deposition"]["rate_limited"] is False


def test_a_cap_below_the_rate_limit_keeps_one_step_with_both_warnings():
    """max_interval_ps bounds the rate's lengthening too: capped at one step, the interval of
    one step gets the few-steps and the rate warnings."""
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, autocorrelation_time_ps=0.0001,
                      max_interval_ps=0.002)
    assert h["deposition"]["interval_steps"] == 1
    assert len(h["warnings"]) == 2
    assert h["warnings"][0].startswith("the deposition interval is 1 MD step (0.002 ps): a "
                                       "kernel every step is far more often than usual")
    assert "check autocorrelation_time_ps and the MD step" in h["warnings"][0]
    # 0.5 kT = 1.247 kJ/mol every 0.002 ps
    assert h["warnings"][1].startswith("the bias grows at 624 kJ/mol per ps at first")
    assert h["deposition"]["rate_kj_mol_ps"] == pytest.approx(0.5 * KT / 0.002, rel=1e-12)
    # a small height allows a few steps: only the few-steps warning
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, autocorrelation_time_ps=0.0001,
                      height_kt=0.01)  # 0.0249 kJ/mol / 5 kJ/mol/ps = 2.5 steps -> 3
    assert h["deposition"]["interval_steps"] == 3 and h["deposition"]["rate_limited"]
    (text,) = h["warnings"]
    assert text.startswith("the deposition interval is 3 MD steps")


def test_usual_inputs_give_no_warnings():
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, autocorrelation_time_ps=1.0,
                      barrier=50.0)
    assert h["warnings"] == []


def test_budget_flags_slow_states():
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, autocorrelation_time_ps=5.0,
                      barrier=100.0, budget_ns=1.0)
    flags = [r["over_budget"] for rows in h["fill_time"]["states"].values() for r in rows]
    assert all(flags)
    assert any("Over the budget" in line for line in h["reasoning"])


def test_periodic_cv_has_no_walls_and_grid_spans_the_period():
    states = {"a": {"mean": -2.0, "std": 0.3}, "b": {"mean": 1.0, "std": 0.3}}
    h = suggest_hints(states, temperature=T, md_step_fs=1.0, periodic=True, cv_range=(-math.pi, math.pi))
    assert h["walls"] is None
    g = h["grid"]
    assert g["periodic"] and g["lower"] == -math.pi and g["upper"] == math.pi
    assert g["n_points"] == g["n_bins"]
    assert g["n_bins"] * g["spacing"] == pytest.approx(2 * math.pi)


def test_a_bounded_cv_range_drops_walls_beyond_it_and_the_grid_spans_it():
    # lower wall -1.2 - 3 * 0.15 = -1.65 lies below the reachable -1.5: not needed
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, cv_range=(-1.5, 2.0))
    assert h["walls"]["lower"] is None
    assert h["walls"]["upper"] == pytest.approx(0.9 + 3 * 0.25)
    assert (h["grid"]["lower"], h["grid"]["upper"]) == (-1.5, 2.0)
    assert h["grid"]["covers_reachable"] is True
    assert any("No lower wall, since -1.65 is at or below -1.5" in line for line in h["reasoning"])
    assert "walls            lower none (at or beyond the reachable end)" in format_hints(h)


def test_a_cv_unbounded_above_gets_a_grid_over_walls_and_observed_range_and_says_so():
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, cv_range=(-1.5, None),
                      observed_range=(-1.45, 2.4))
    sigma = h["kernel"]["sigma"]
    margin = 6 * sigma  # 5 sigma of the Gaussian kernel plus 1 sigma of overshoot
    assert h["walls"]["lower"] is None
    assert h["grid"]["lower"] == -1.5  # clipped to the reachable lower end
    assert h["grid"]["upper"] == pytest.approx(2.4 + margin)  # the observed maximum, beyond the wall
    assert h["grid"]["covers_reachable"] is False
    line = next(x for x in h["reasoning"] if x.startswith("Grid:"))
    assert "the CV is unbounded above" in line and "Keep the walls" in line
    assert "does NOT span every value the CV can reach" in format_hints(h)


def test_a_bounded_range_too_wide_for_the_grid_falls_back_and_says_why():
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, cv_range=(-1e4, 1e4))
    assert h["grid"]["covers_reachable"] is False
    assert h["walls"]["lower"] == pytest.approx(-1.65) and h["grid"]["lower"] > -1e4
    line = next(x for x in h["reasoning"] if x.startswith("Grid:"))
    assert "more than max_grid_bins=100000" in line


@pytest.mark.parametrize("cv_range,observed,match", [
    ((1.0, 1.0), None, r"cv_range=\(1\.0, 1\.0\) must have lower < upper"),
    (None, (2.0, 1.0), r"observed_range=\(2\.0, 1\.0\) must have lower <= upper"),
    (None, 3.0, r"observed_range must be a pair \(lower, upper\); got 3\.0"),
])
def test_bad_ranges_are_refused_by_name(cv_range, observed, match):
    with pytest.raises(InputError, match=match):
        suggest_hints(STATES, temperature=T, md_step_fs=2.0, cv_range=cv_range,
                      observed_range=observed)


def test_a_periodic_cv_needs_both_ends_of_its_range():
    with pytest.raises(InputError, match=r"cv_range is required when periodic=True, with both "
                                         r"ends"):
        suggest_hints(STATES, temperature=T, md_step_fs=2.0, periodic=True,
                      cv_range=(-math.pi, None))


def test_hints_are_deterministic():
    a = suggest_hints(STATES, temperature=T, md_step_fs=2.0, barrier=45.0)
    b = suggest_hints(STATES, temperature=T, md_step_fs=2.0, barrier=45.0)
    assert json.dumps(a, sort_keys=True) == json.dumps(b, sort_keys=True)


@pytest.mark.parametrize(
    "kwargs,match",
    [
        ({"temperature": -300.0}, r"temperature=-300\.0 must be > 0"),
        ({"temperature": 0.0}, r"temperature=0\.0 must be > 0"),
        ({"md_step_fs": 0.0}, r"md_step_fs=0\.0 must be > 0"),
        ({"kernel": "box"}, r"kernel='box' is not known"),
        ({"autocorrelation_time_ps": -1.0}, r"autocorrelation_time_ps=-1\.0"),
        ({"barrier": float("nan")}, r"barrier=nan must be finite"),
        ({"barrier": {"closed": 40.0}}, r"barrier must give one value per state.*'open'"),
        ({"bias_factor": 1.0}, r"bias_factor=1\.0 must be > 1"),
        ({"width_fraction": 2.0}, r"width_fraction=2\.0"),
        ({"periodic": True}, r"cv_range is required"),
        ({"cv_range": (1.0, 0.0)}, r"cv_range=\(1\.0, 0\.0\) must have lower < upper"),
    ],
)
def test_bad_arguments_raise_naming_the_argument(kwargs, match):
    args = {"temperature": T, "md_step_fs": 2.0, **kwargs}
    with pytest.raises(ValueError, match=match):
        suggest_hints(STATES, **args)


def test_negative_std_raises_naming_the_state():
    states = {"a": {"mean": 0.0, "std": -0.1}, "b": {"mean": 1.0, "std": 0.1}}
    with pytest.raises(InputError, match=r"states\['a'\]\['std'\]=-0\.1 must be >= 0"):
        suggest_hints(states, temperature=T, md_step_fs=2.0)


# --------------------------------------------------------------------------
# refusals and warnings


@pytest.mark.parametrize(
    "kwargs,match",
    [
        ({"temperature": 0.5},
         r"temperature=0\.5 K is below 1 K: no barrier is crossed thermally there.*give the "
         r"temperature of the biased run in kelvin"),
        ({"temperature": 10000.0},
         r"temperature=10000\.0 K is above 5000 K, hotter than any molecular simulation.*in "
         r"kelvin \(e\.g\. 300\), not in other units"),
        ({"md_step_fs": 1.0e6},  # an MD step of 1000 ps
         r"md_step_fs=1000000\.0 fs \(1000 ps\) is longer than 100 fs, beyond the stable step "
         r"of any MD integrator.*give the MD step of the biased run in femtoseconds"),
        ({"md_step_fs": 0.002},  # 2 fs given in ps
         r"md_step_fs=0\.002 fs is shorter than 0\.01 fs.*if 0\.002 is in ps, that is 2 fs"),
        ({"barrier": 2.0},
         r"barrier=2\.0 kJ/mol is below kT = 2\.494 kJ/mol at 300 K: states separated by less "
         r"than kT are not metastable.*1 kcal/mol = 4\.184 kJ/mol"),
        ({"barrier": {"closed": 40.0, "open": 0.5}},
         r"barrier\['open'\]=0\.5 kJ/mol is below kT"),
        ({"barrier_levels": (1.0, 20.0)}, r"barrier_levels\[0\]=1\.0 kJ/mol is below kT"),
        ({"max_grid_bins": 0}, r"max_grid_bins=0 must be a positive integer"),
    ],
)
def test_impossible_inputs_are_refused_with_the_reason(kwargs, match):
    args = {"temperature": T, "md_step_fs": 2.0, **kwargs}
    with pytest.raises(InputError, match=match):
        suggest_hints(STATES, **args)


def test_a_barrier_just_above_kt_is_accepted():
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, barrier=1.01 * KT)
    assert h["well_tempered"]["bias_factor"] == 2.0  # the floor, with its note
    assert any("may need little or no bias" in line for line in h["reasoning"])


@pytest.mark.parametrize(
    "kwargs,start",
    [
        ({"temperature": 25.0}, "temperature=25 K is below 100 K, unusual for a molecular "
                                "simulation; check that it is in kelvin (25 degrees Celsius = "
                                "298.15 K)"),
        ({"temperature": 3000.0}, "temperature=3000 K is above 2000 K, unusual"),
        ({"md_step_fs": 20.0}, "md_step_fs=20 fs is longer than 5 fs: usual for coarse-grained "
                               "models only"),
        ({"md_step_fs": 0.05}, "md_step_fs=0.05 fs is shorter than 0.1 fs, unusually short"),
        ({"barrier": 5000.0}, "the barrier estimate for 'closed', 5000 kJ/mol, is above 400 "
                              "kJ/mol, more than it takes to break a C-C bond; check that it is "
                              "in kJ/mol (not J/mol)"),
    ],
)
def test_unusual_inputs_give_a_warning_and_hints(kwargs, start):
    args = {"temperature": T, "md_step_fs": 2.0, "autocorrelation_time_ps": 1.0, **kwargs}
    h = suggest_hints(STATES, **args)
    assert [w for w in h["warnings"] if w.startswith(start)], h["warnings"]
    assert h["kernel"]["sigma"] == pytest.approx(0.075)
    text = format_hints(h)
    assert f"WARNING: {h['warnings'][0]}" in text
    assert text.index("WARNING") < text.index("kernel ")  # shown before the values


def test_check_run_conditions_matches_suggest_hints():
    assert check_run_conditions(300.0, 2.0) == []
    h = suggest_hints(STATES, temperature=50.0, md_step_fs=8.0)
    assert check_run_conditions(50.0, 8.0) == h["warnings"][:2]
    with pytest.raises(InputError, match=r"md_step_fs=200\.0 fs \(0\.2 ps\) is longer"):
        check_run_conditions(300.0, 200.0)


@pytest.mark.parametrize("std", [0.0, 1e-16])
def test_states_without_spread_are_refused_not_given_a_tiny_kernel(std):
    # frozen input: every state's std is 0 or ~1e-16 relative to the mean
    states = {"a": {"mean": 1.3, "std": std}, "b": {"mean": 1.3, "std": std * 0.5}}
    for leave_out in (False, True):
        with pytest.raises(InputError, match=r"no state has a resolvable spread of the CV; "
                                             r"hints need the within-state spread: 'a' \(std "
                                             r".*not above 1\.3e-06 = 1e-06 x the CV's scale 1\.3"
                                             r".*meaningless; choose a CV that fluctuates "
                                             r"within the states"):
            suggest_hints(states, temperature=T, md_step_fs=2.0, leave_out_frozen=leave_out)


def test_states_without_spread_at_zero_mean_are_refused_by_the_floor():
    states = {"a": {"mean": 0.0, "std": 1e-16}, "b": {"mean": 0.0, "std": 3e-17}}
    with pytest.raises(InputError, match=r"no state has a resolvable spread.*not above "
                                         r"1e-12 CV units \(the floor\)"):
        suggest_hints(states, temperature=T, md_step_fs=2.0)


def test_one_frozen_state_is_refused_or_left_out_with_a_warning():
    states = {"frozen": {"mean": -1.0, "std": 1e-13}, "open": {"mean": 0.9, "std": 0.25}}
    with pytest.raises(InputError, match=r"a state has no resolvable spread of the CV.*"
                                         r"'frozen' \(std 1e-13 CV units\).*leave that state out "
                                         r"of the states given"):
        suggest_hints(states, temperature=T, md_step_fs=2.0)
    h = suggest_hints(states, temperature=T, md_step_fs=2.0, leave_out_frozen=True)
    assert h["warnings"][0].startswith("left out of the kernel width and the fill times, kept "
                                       "inside the walls: 'frozen' (std 1e-13 CV units)")
    assert h["kernel"]["reference_state"] == "open"
    assert h["kernel"]["sigma"] == pytest.approx(0.125)
    assert set(h["fill_time"]["states"]) == {"open"}
    assert h["walls"]["lower"] == pytest.approx(-1.0)  # the frozen state's mean stays inside
    assert h["walls"]["upper"] == pytest.approx(0.9 + 3 * 0.25)


def test_a_grid_beyond_the_maximum_is_refused_with_what_to_change():
    states = {"narrow": {"mean": 0.0, "std": 1e-5}, "wide": {"mean": 5.0, "std": 0.5}}
    with pytest.raises(InputError, match=r"the grid would need about 6\.5e\+06 bins \(\[-6e-05, "
                                         r"6\.5\] at a spacing of 0\.2 x sigma = 1e-06 CV "
                                         r"units\), more than max_grid_bins=100000: the "
                                         r"narrowest state "
                                         r"\('narrow', std 1e-05\).*comparable spreads; "
                                         r"or, in Python \(suggest_hints, spec_hints\), "
                                         r"give a narrower cv_range"):
        suggest_hints(states, temperature=T, md_step_fs=2.0)
    h = suggest_hints(states, temperature=T, md_step_fs=2.0, max_grid_bins=10**7)
    assert h["grid"]["n_bins"] > 10**5
    assert MAX_GRID_BINS == 100_000


def test_empty_or_malformed_states_raise():
    with pytest.raises(InputError, match="states must be a non-empty dict"):
        suggest_hints({}, temperature=T, md_step_fs=2.0)
    with pytest.raises(InputError, match=r"states\['a'\] must be a dict with 'mean' and 'std'"):
        suggest_hints({"a": {"mean": 0.0}}, temperature=T, md_step_fs=2.0)


def test_kernel_functions_reject_bad_width():
    with pytest.raises(InputError, match=r"cutoff=0\.0 must be > 0"):
        lucy_kernel(0.1, 0.0)
    with pytest.raises(InputError, match=r"sigma=-1\.0 must be > 0"):
        gaussian_kernel(0.1, -1.0)
    with pytest.raises(InputError, match=r"kernel='cosine' is not known"):
        kernel_area_per_height("cosine", 1.0)


# --------------------------------------------------------------------------
# format_hints


def test_format_hints_shows_values_reasoning_and_caution():
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, autocorrelation_time_ps=1.0)
    text = format_hints(h)
    assert text.count(CAUTION) == 2
    assert "500 steps = 1 ps" in text
    assert "Fill time per state" in text and "closed" in text and "open" in text
    assert "bias factor by barrier estimate" in text
    for line in h["reasoning"]:
        assert line in text
    # a JSON round trip formats the same
    assert format_hints(json.loads(json.dumps(h))) == text


def test_format_hints_rejects_other_dicts():
    with pytest.raises(InputError, match="hints must be a dict returned by suggest_hints"):
        format_hints({"kernel": {}})


def test_hints_warn_that_a_folded_coordinate_narrows_the_kernel_width():
    # cos of a torsion whose states sit near 0 and pi: both at a bound of [-1, 1]
    folded = {"closed": {"mean": -0.999, "std": 0.001, "n_frames": 500},
              "open": {"mean": 0.998, "std": 0.002, "n_frames": 500}}
    h = suggest_hints(folded, temperature=300.0, md_step_fs=2.0, cv_range=(-1.0, 1.0))
    (warning,) = [w for w in h["warnings"] if "folded coordinate" in w]
    assert "state 'closed' sits at the lower" in warning and "'open' sits at the upper" in warning
    assert "kernels about 5 times wider" in warning
    # the same states well inside the range, or no range given: no such warning
    inside = {"closed": {"mean": -0.5, "std": 0.05, "n_frames": 500},
              "open": {"mean": 0.5, "std": 0.05, "n_frames": 500}}
    for kwargs in ({"cv_range": (-1.0, 1.0)}, {}):
        states = inside if kwargs else folded
        h = suggest_hints(states, temperature=300.0, md_step_fs=2.0, **kwargs)
        assert not any("folded coordinate" in w for w in h["warnings"])


def test_a_folded_states_spread_where_the_cv_is_steepest_matches_a_sampled_torsion():
    """Simulation check of the derived width: torsions drawn about 0 and pi with spreads of
    0.2 and 0.3 rad, the CV their cosine (reachable range [-1, 1]). The warning's width at
    the CV's steepest part is half the narrower torsion spread (0.5 x 0.2 rad x slope 1 =
    0.1 CV units), recovered from the sampled means alone to a few percent; the width from
    the spreads along the CV (0.5 x about 0.2^2 / sqrt(2) = 0.014) is far narrower."""
    rng = np.random.default_rng(7)
    states = {}
    for name, centre, spread in (("closed", np.pi, 0.2), ("open", 0.0, 0.3)):
        cv = np.cos(centre + spread * rng.standard_normal(200_000))
        states[name] = {"mean": float(cv.mean()), "std": float(cv.std()), "n_frames": cv.size}
    h = suggest_hints(states, temperature=300.0, md_step_fs=2.0, cv_range=(-1.0, 1.0))
    (warning,) = [w for w in h["warnings"] if "folded coordinate" in w]
    match = re.search(r"\(about (\S+) CV units there, (\S+) times this width", warning)
    wide, ratio = float(match.group(1)), float(match.group(2))
    assert wide == pytest.approx(0.5 * 0.2, rel=0.03)
    assert ratio == pytest.approx(wide / h["kernel"]["sigma"], rel=0.01)
    assert h["kernel"]["sigma"] == pytest.approx(0.5 * 0.2 ** 2 / math.sqrt(2), rel=0.05)
    assert "fills in up to about half the time given" in warning


def test_a_time_below_the_frame_spacing_is_flagged_as_not_resolved_by_the_frames():
    """Sokal's estimate dt (1/2 + sum rho) is about half a frame spacing whenever the CV has
    decorrelated by the next frame, so a time below one spacing measures the frames, not
    the CV: the hints say so (and say nothing when the frames resolve it)."""
    kw = dict(temperature=T, md_step_fs=2.0, barrier=50.0)
    fine = suggest_hints(STATES, autocorrelation_time_ps=1.0, frame_spacing_ps=0.1, **kw)
    assert fine["deposition"]["tau_resolved"] is True and fine["warnings"] == []
    assert fine["inputs"]["frame_spacing_ps"] == 0.1
    coarse = suggest_hints(STATES, autocorrelation_time_ps=1.0, frame_spacing_ps=2.0, **kw)
    assert coarse["deposition"]["tau_resolved"] is False
    # the interval is still sized from the time (1 ps = 500 steps of 2 fs), with a warning
    assert coarse["deposition"]["interval_steps"] == fine["deposition"]["interval_steps"] == 500
    (text,) = coarse["warnings"]
    assert "shorter than the spacing of the saved frames it was measured on (2 ps)" in text
    assert "and so is an interval sized from it (1 ps)" in text
    assert "save frames more often than every 2 ps" in text
    assert any(line == "Note: " + text + "." for line in coarse["reasoning"])
    unknown = suggest_hints(STATES, autocorrelation_time_ps=1.0, **kw)
    assert unknown["deposition"]["tau_resolved"] is None


def test_a_time_that_did_not_decay_is_flagged_as_a_lower_bound():
    kw = dict(temperature=T, md_step_fs=2.0, barrier=50.0, autocorrelation_time_ps=1.0)
    h = suggest_hints(STATES, autocorrelation_time_decayed=False, **kw)
    assert h["deposition"]["tau_lower_bound"] is True
    (text,) = h["warnings"]
    assert text.startswith("autocorrelation_time_ps = 1 ps is a lower bound")
    h = suggest_hints(STATES, autocorrelation_time_decayed=True, **kw)
    assert h["deposition"]["tau_lower_bound"] is False and h["warnings"] == []
    with pytest.raises(InputError, match="autocorrelation_time_decayed must be True, False or "
                                         "None; got 'no'"):
        suggest_hints(STATES, autocorrelation_time_decayed="no", **kw)
    with pytest.raises(InputError, match="frame_spacing_ps"):
        suggest_hints(STATES, frame_spacing_ps=-1.0, **kw)


def test_a_fast_deposition_rate_is_lengthened_and_only_a_cap_keeps_it_with_a_warning():
    """Rate = initial height / interval: 0.5 kT = 1.247 kJ/mol at 300 K every 0.2 ps is 6.2
    kJ/mol/ps, above the 5 kJ/mol/ps the hints flag (usual rates are about 1; common
    practice, from memory): the interval becomes 125 steps (0.25 ps); every 0.3 ps it is 4.2,
    kept. Under a cap of 0.2 ps the interval stays at 0.2 ps, with the warning."""
    kw = dict(temperature=T, md_step_fs=2.0, barrier=50.0)
    fast = suggest_hints(STATES, autocorrelation_time_ps=0.2, **kw)
    assert fast["deposition"]["interval_steps"] == 125 and fast["warnings"] == []
    capped = suggest_hints(STATES, autocorrelation_time_ps=0.2, max_interval_ps=0.2, **kw)
    assert capped["deposition"]["rate_kj_mol_ps"] == pytest.approx(0.5 * KT / 0.2, rel=1e-12)
    (text,) = capped["warnings"]
    assert text.startswith("the bias grows at 6.24 kJ/mol per ps at first (1.25 kJ/mol every "
                           "0.2 ps)")
    assert "about 624 steps for 1 kJ/mol/ps" in text  # 1.247 ps of 2 fs steps
    usual = suggest_hints(STATES, autocorrelation_time_ps=0.3, **kw)
    assert usual["warnings"] == [] and usual["deposition"]["interval_steps"] == 150
    assert usual["deposition"]["rate_limited"] is False


def test_an_unresolved_time_capped_and_a_short_lower_bound_are_worded_as_they_are():
    """Review cases: a time of 12 ps from frames 20 ps apart, capped to 10 ps, is worded with
    both numbers; a lower bound below the spacing (visits too short) is a lower bound, not a
    time the CV 'decorrelates within one frame'."""
    kw = dict(temperature=T, md_step_fs=2.0, barrier=50.0)
    h = suggest_hints(STATES, autocorrelation_time_ps=12.0, frame_spacing_ps=20.0, **kw)
    assert h["deposition"]["interval_ps"] == 10.0 and h["deposition"]["capped"]
    (text,) = h["warnings"]
    assert "an interval sized from it (10 ps)" in text
    assert any(line.startswith("Note: 12 ps is above max_interval_ps = 10 ps")
               for line in h["reasoning"])
    h = suggest_hints(STATES, autocorrelation_time_ps=0.13, frame_spacing_ps=0.2,
                      autocorrelation_time_decayed=False, **kw)
    assert h["deposition"]["tau_lower_bound"] is True
    assert not any("decorrelates within about one frame" in w for w in h["warnings"])
    assert any("is a lower bound" in w for w in h["warnings"])


def test_a_capped_lower_bound_still_says_it_is_a_lower_bound():
    # capped at 10 ps, a 30 ps time that had not decayed gave no warning at all: only
    # tau_lower_bound in the JSON showed it (a review case)
    kw = dict(temperature=T, md_step_fs=2.0, barrier=50.0)
    h = suggest_hints(STATES, autocorrelation_time_ps=30.0, autocorrelation_time_decayed=False,
                      **kw)
    assert h["deposition"]["capped"] and h["deposition"]["tau_lower_bound"] is True
    assert any("capped above, is itself a lower bound" in w for w in h["warnings"])
    decayed = suggest_hints(STATES, autocorrelation_time_ps=30.0,
                            autocorrelation_time_decayed=True, **kw)
    assert not any("lower bound" in w for w in decayed["warnings"])


def test_the_bias_factor_names_the_largest_estimate_only_when_the_states_differ():
    kw = dict(temperature=T, md_step_fs=2.0, autocorrelation_time_ps=1.0)
    one = suggest_hints(STATES, barrier=40.0, **kw)["reasoning"]
    assert any(line.startswith("Bias factor: gamma = ") and "for the barrier estimate 40 kJ/mol"
               in line for line in one)
    names = list(STATES)
    two = suggest_hints(STATES, barrier={names[0]: 30.0, names[1]: 40.0}, **kw)["reasoning"]
    assert any("for the largest barrier estimate 40 kJ/mol" in line for line in two)


def test_a_state_at_the_only_bound_of_a_half_bounded_cv_gets_the_warning_without_the_width():
    # a distance-like CV, reachable from 0 up: the cosine-fold width needs both ends
    near_zero = {"bound": {"mean": 0.02, "std": 0.015, "n_frames": 500},
                 "away": {"mean": 1.0, "std": 0.05, "n_frames": 500}}
    h = suggest_hints(near_zero, temperature=300.0, md_step_fs=2.0, cv_range=(0.0, None))
    (warning,) = [w for w in h["warnings"] if "folded coordinate" in w]
    assert "state 'bound' sits at the lower" in warning
    assert "CV units there" not in warning


def test_a_cap_that_stops_the_lengthening_short_of_the_rate_says_so():
    # tau 0.002 ps (1 step), max_interval_ps 0.1 ps (50 steps): lengthened to 50 steps, a
    # rate of 1.2472 / 0.1 = 12.5 kJ/mol/ps, above the 5 the note would otherwise claim
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, autocorrelation_time_ps=0.002,
                      max_interval_ps=0.1)
    assert h["deposition"]["interval_steps"] == 50 and h["deposition"]["rate_limited"]
    (note,) = [line for line in h["reasoning"] if "lengthened to 50 steps" in line]
    assert "as far as max_interval_ps = 0.1 ps allows: a rate of 12.5 kJ/mol/ps" in note
    assert "at most 5" not in note
    assert any(w.startswith("the bias grows at 12.5 kJ/mol per ps") for w in h["warnings"])
    assert ("50 steps = 0.1 ps (lengthened toward 5 kJ/mol per ps, stopped by "
            "max_interval_ps)") in format_hints(h)


def test_the_few_steps_warning_and_the_rate_note_name_what_set_the_interval():
    """Review findings: after the rate's lengthening the few-steps warning blamed the CV's
    time, and with no time the note named an autocorrelation time that was a placeholder."""
    h = suggest_hints(STATES, temperature=T, md_step_fs=4.0, autocorrelation_time_ps=0.004,
                      height_kt=0.05)  # 0.1247 kJ/mol / 5 kJ/mol/ps = 0.025 ps = 6.2 -> 7 steps
    (few,) = [w for w in h["warnings"] if w.startswith("the deposition interval is 7 MD steps")]
    assert "what a rate of 5 kJ/mol per ps allows at the small initial height" in few
    assert "check autocorrelation_time_ps" not in few
    h = suggest_hints(STATES, temperature=T, md_step_fs=2.0, height_kt=3.0)  # no time: 1 ps
    (note,) = [line for line in h["reasoning"] if line.startswith("Note: the interval from")]
    assert note.startswith("Note: the interval from the 1 ps placeholder (no autocorrelation "
                           "time), 500 steps (1 ps)")
