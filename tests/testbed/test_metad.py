"""Well-tempered metadynamics in the testbed: forces, grid, heights, a known ΔF."""

import time

import numpy as np
import pytest

from cvdesign.testbed import LangevinBAOAB, dihedral_angles
from cvdesign.testbed.metad import (
    WellTemperedBias,
    asymmetric_torsion,
    asymmetric_torsion_delta_f,
    asymmetric_torsion_potential,
    dihedral_cv,
    run_biased,
    well_delta_f,
)
from cvdesign.testbed.scenarios import count_transitions

T = 300.0


def _bias(cv, **kw):
    args = dict(sigma=0.3, height=1.0, interval_steps=100, bias_factor=6.0, temperature=T,
                grid=(-np.pi, np.pi, 120), periodic=True)
    args.update(kw)
    return WellTemperedBias(cv, **args)


def _reference(system, temperature=T):
    return asymmetric_torsion_delta_f(system, temperature)


def _jiggled(system, seed=0):
    rng = np.random.default_rng(seed)
    return system.states["cis"] + 0.02 * rng.standard_normal((4, 3))


def test_dihedral_cv_matches_forcefield_and_finite_differences():
    system = asymmetric_torsion()
    cv = dihedral_cv(system.slow_dihedral)
    x = _jiggled(system)
    value, grad = cv(x)
    assert value == pytest.approx(float(dihedral_angles(x, [system.slow_dihedral])[0]))
    eps = 1e-6
    fd = np.zeros_like(x)
    for idx in np.ndindex(x.shape):
        xp, xm = x.copy(), x.copy()
        xp[idx] += eps
        xm[idx] -= eps
        fd[idx] = (cv(xp)[0] - cv(xm)[0]) / (2 * eps)
    np.testing.assert_allclose(grad, fd, atol=1e-6)


@pytest.mark.parametrize("periodic", [True, False])
def test_bias_force_is_minus_gradient_of_bias_energy(periodic):
    system = asymmetric_torsion()
    cv = dihedral_cv(system.slow_dihedral)
    grid = (-np.pi, np.pi, 120) if periodic else (-3.5, 3.5, 140)
    bias = _bias(cv, periodic=periodic, grid=grid)
    rng = np.random.default_rng(1)
    for c in rng.uniform(-np.pi, np.pi, 30):
        bias.deposit(c)
    ff = system.force_field.with_bias(bias)
    for seed in range(3):
        x = _jiggled(system, seed)
        energy, forces = bias(x)
        assert energy > 0.0
        eps = 1e-6
        fd = np.zeros_like(x)
        for idx in np.ndindex(x.shape):
            xp, xm = x.copy(), x.copy()
            xp[idx] += eps
            xm[idx] -= eps
            fd[idx] = -(bias(xp)[0] - bias(xm)[0]) / (2 * eps)
        np.testing.assert_allclose(forces, fd, atol=1e-5 * max(1.0, np.abs(fd).max()))
        # The hook adds exactly this to the unbiased force field.
        e_all, f_all = ff.energy_forces(x)
        e0, f0 = system.force_field.energy_forces(x)
        assert e_all - e0 == pytest.approx(energy)
        np.testing.assert_allclose(f_all - f0, forces, atol=1e-9)


@pytest.mark.parametrize("periodic", [True, False])
def test_grid_interpolation_matches_direct_kernel_sum(periodic):
    grid = (-np.pi, np.pi, 120) if periodic else (-2.0, 2.0, 80)
    bias = _bias(lambda x: (0.0, 0 * x), periodic=periodic, grid=grid, bias_factor=3.0)
    rng = np.random.default_rng(2)
    for c in rng.uniform(grid[0], grid[1], 200):
        bias.deposit(c)
    s = np.linspace(grid[0], grid[1], 1001)
    direct = bias.kernel_sum(s)
    np.testing.assert_allclose(bias.bias_at(s), direct, atol=1e-3 * direct.max())
    # The derivative from the grid matches the derivative of the kernel sum.
    eps = 1e-5
    fd = (bias.kernel_sum(s[1:-1] + eps) - bias.kernel_sum(s[1:-1] - eps)) / (2 * eps)
    deriv = bias.bias_and_derivative(s[1:-1])[1]
    np.testing.assert_allclose(deriv, fd, atol=1e-2 * np.abs(fd).max())
    if periodic:  # wrap-around: s and s + period agree
        np.testing.assert_allclose(bias.bias_at(s + 2 * np.pi), bias.bias_at(s), atol=1e-12)


def test_well_tempered_heights_decay():
    bias = _bias(lambda x: (0.0, 0 * x), bias_factor=5.0, height=2.0)
    heights = [bias.deposit(0.5) for _ in range(200)]
    assert heights[0] == 2.0
    assert np.all(np.diff(heights) < 0)
    # Each height is h exp(-V(s)/(kB dT)) with V the bias just before.
    kdt = 0.00831446261815324 * (5.0 - 1.0) * T
    v_before = np.cumsum([0.0] + heights[:-1])  # all kernels at one point
    np.testing.assert_allclose(heights, 2.0 * np.exp(-v_before / kdt), rtol=1e-4)
    # Total bias grows only like kB dT log(t): far below 200 full kernels.
    assert bias.bias_at(0.5) < 0.2 * 200 * 2.0


def test_torsion_is_decoupled_unbiased_low_barrier():
    """The 1-D quadrature describes the dihedral of the full 3-D system.

    With a low barrier the unbiased dynamics crosses often, and the well
    populations must match the quadrature reference.
    """
    system = asymmetric_torsion(k_twofold=1.0, k_onefold=1.0)
    integ = LangevinBAOAB(system.force_field, system.masses, temperature=T,
                          friction=2.0, md_step_ps=0.005, seed=3)
    x0 = np.stack([system.states["cis"], system.states["trans"]] * 4)
    xyz, _ = integ.run(x0, 30000, report_interval=10)  # 150 ps per walker
    phi = system.slow_angle(xyz).ravel()
    p_cis = np.mean(np.abs(phi) < np.pi / 2)
    kT = 0.00831446261815324 * T
    measured = -kT * np.log(p_cis / (1 - p_cis))
    assert measured == pytest.approx(_reference(system), abs=0.6)


@pytest.mark.slow
def test_metadynamics_recovers_reference_delta_f_and_crosses():
    system = asymmetric_torsion()  # barrier ~20 kJ/mol (8 kT), wells 4 kJ/mol apart
    reference = _reference(system)
    assert reference == pytest.approx(3.85, abs=0.01)
    cv = dihedral_cv(system.slow_dihedral)
    x0 = np.stack([system.states["trans"], system.states["cis"]] * 4)
    n_steps = 20000  # 100 ps per walker, 8 walkers

    start = time.perf_counter()
    bias = _bias(cv, height=0.5, bias_factor=5.0)
    run = run_biased(system, x0, n_steps, bias=bias, friction=2.0, md_step_ps=0.005,
                     seed=7, report_interval=20)
    elapsed = time.perf_counter() - start
    assert run.cv.shape == (n_steps // 20, 8)
    assert bias.n_kernels == 8 * n_steps // 100

    wells = system.wells["cis"], system.wells["trans"]
    f_mean = bias.free_energy(values=run.mean_values)
    f_final = bias.free_energy()
    dF_mean = well_delta_f(bias.nodes, f_mean, T, *wells)
    dF_final = well_delta_f(bias.nodes, f_final, T, *wells)
    print(f"reference {reference:.2f}, time-averaged {dF_mean:.2f}, final {dF_final:.2f} "
          f"kJ/mol; {elapsed:.1f} s")
    assert abs(dF_mean - reference) < 2.0
    assert abs(dF_final - reference) < 2.0

    # The profile itself follows the torsion potential in the wells.
    v = asymmetric_torsion_potential(bias.nodes)
    core = np.abs(np.abs(bias.nodes) - np.pi / 2) > 0.5
    err = (f_mean - v)[core]
    assert np.abs(err - err.mean()).max() < 3.0

    biased = sum(count_transitions(c) for c in run.cv.T)
    integ = LangevinBAOAB(system.force_field, system.masses, temperature=T,
                          friction=2.0, md_step_ps=0.005, seed=7)
    xyz, _ = integ.run(x0, n_steps, report_interval=20)
    unbiased = sum(count_transitions(c) for c in system.slow_angle(xyz).T)
    print(f"transitions biased {biased}, unbiased {unbiased}")
    assert biased >= 100
    assert unbiased <= biased / 10


def test_seeded_runs_are_identical():
    system = asymmetric_torsion()
    cv = dihedral_cv(system.slow_dihedral)
    runs = [run_biased(system, system.states["trans"], 400, bias=_bias(cv, interval_steps=50),
                       friction=2.0, md_step_ps=0.005, seed=11) for _ in range(2)]
    np.testing.assert_array_equal(runs[0].cv, runs[1].cv)
    np.testing.assert_array_equal(runs[0].bias.values, runs[1].bias.values)


def test_rejects_bad_arguments():
    cv = lambda x: (0.0, 0 * x)  # noqa: E731
    with pytest.raises(ValueError, match="bias_factor"):
        _bias(cv, bias_factor=1.0)
    with pytest.raises(ValueError, match="grid"):
        _bias(cv, grid=(1.0, 0.0, 10))
    with pytest.raises(TypeError, match="cv must be a callable"):
        _bias(3.0)
    # No CV callable is allowed (an engine evaluates the CV), but then the bias is no
    # force-field hook.
    with pytest.raises(TypeError, match="no CV callable"):
        _bias(None)(np.zeros((4, 3)))
    system = asymmetric_torsion()
    with pytest.raises(ValueError, match=r"report_interval=7 must divide interval_steps=50"):
        run_biased(system, system.states["cis"], 100, bias=_bias(cv, interval_steps=50),
                   friction=1.0, md_step_ps=0.004, report_interval=7)
