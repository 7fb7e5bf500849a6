"""Tests of the testbed pieces added for the metadynamics hand-off.

* :meth:`ToyForceField.with_torsion_scale` and the stack path of the bias hook
  (a bias with a true ``accepts_stacks`` is called once per stack);
* :func:`spec_cv` (a :class:`cvdesign.Spec` as a CV callable), the stack path
  of :class:`WellTemperedBias`, ``run_biased(..., observe=...)``;
* :func:`softened_delta_f`, a reweighted reference for the free-energy
  difference between two wells. The reweighting identity
  ``<A>_U = <A exp(-(U - U') / kT)>_U' / <exp(-(U - U') / kT)>_U'`` is
  Zwanzig, J. Chem. Phys. 22, 1420 (1954) (from memory); the known answer is
  the one-dimensional quadrature of :func:`asymmetric_torsion_potential`
  (3.85 kJ/mol at 300 K, as in ``tests/testbed/test_metad.py``).
"""

import numpy as np
import pytest

from cvdesign import Spec
from cvdesign.testbed import LangevinBAOAB, ToyForceField, dihedral_angles, latch
from cvdesign.testbed.metad import (
    SoftenedReference,
    WellTemperedBias,
    asymmetric_torsion,
    asymmetric_torsion_delta_f,
    dihedral_cv,
    run_biased,
    softened_delta_f,
    spec_cv,
)

T = 300.0
LATCH_SLOW = (2, 3, 4, 5)
# The latch torsion as documented in cvdesign.testbed.toys.latch:
# 17.5 (1 + cos(2 phi - pi)) kJ/mol.
LATCH_K, LATCH_N, LATCH_DELTA = 17.5, 2, np.pi


@pytest.fixture(scope="module")
def latch_system():
    return latch()


@pytest.fixture(scope="module")
def torsion_system():
    return asymmetric_torsion()


def _jiggled_stack(system, n, *, scale=0.01, seed=0, states=None):
    """`n` configurations near the system's states (alternating), shape (n, n_atoms, 3)."""
    rng = np.random.default_rng(seed)
    names = list(system.states) if states is None else list(states)
    base = np.stack([system.states[names[i % len(names)]] for i in range(n)])
    return base + scale * rng.standard_normal(base.shape)


def _latch_turned(system, n, *, scale=0.005, seed=0):
    """Latch configurations with the slow dihedral spread around the circle.

    Atoms beyond the central bond C4-C5 (indices 5..11) of the open structure
    are rotated about that bond by ``2 pi m / n``, then every atom is jiggled.
    """
    rng = np.random.default_rng(seed)
    x = system.states["open"]
    axis = x[4] - x[3]
    axis = axis / np.linalg.norm(axis)
    out = []
    for m in range(n):
        t = 2 * np.pi * (m + 0.3) / n
        k = np.array([[0, -axis[2], axis[1]], [axis[2], 0, -axis[0]],
                      [-axis[1], axis[0], 0]])
        rot = np.eye(3) + np.sin(t) * k + (1 - np.cos(t)) * (k @ k)
        y = x.copy()
        y[5:] = (y[5:] - x[4]) @ rot.T + x[4]
        out.append(y)
    out = np.array(out)
    return out + scale * rng.standard_normal(out.shape)


def _central_difference(f, x, eps=1e-6):
    """Central-difference gradient of a per-configuration scalar `f` on a stack `x`.

    `f(x)` maps ``(..., n_atoms, 3)`` to ``(...)``; configurations are
    independent, so one coordinate is displaced in all of them at once.
    """
    grad = np.zeros_like(x)
    for a in range(x.shape[-2]):
        for d in range(3):
            xp, xm = x.copy(), x.copy()
            xp[..., a, d] += eps
            xm[..., a, d] -= eps
            grad[..., a, d] = (np.asarray(f(xp)) - np.asarray(f(xm))) / (2 * eps)
    return grad


def _wrapped(a):
    """Angle difference mapped to (-pi, pi]."""
    return np.angle(np.exp(1j * np.asarray(a)))


def _latch_torsion_energy(x):
    """The latch torsion's own energy, by hand: k (1 + cos(n phi - delta))."""
    phi = dihedral_angles(x, [LATCH_SLOW])[..., 0]
    return LATCH_K * (1.0 + np.cos(LATCH_N * phi - LATCH_DELTA))


def _dihedral_spec(system, atoms, **term):
    t = {"descriptor": "phi", "transform": "identity", "center": 0.0, "scale": 1.0,
         "weight": 1.0}
    t.update(term)
    return Spec(name="phi", topology=system.topology,
                descriptors=[{"id": "phi", "kind": "dihedral", "atoms": list(atoms)}],
                terms=[t], periodic=t["transform"] == "identity")


def _wt_bias(cv, **kw):
    args = dict(sigma=0.3, height=1.0, interval_steps=50, bias_factor=6.0, temperature=T,
                grid=(-np.pi, np.pi, 120), periodic=True)
    args.update(kw)
    return WellTemperedBias(cv, **args)


def _reference(system, temperature=T):
    return asymmetric_torsion_delta_f(system, temperature)


# --------------------------------------------------------------------------
# ToyForceField.with_torsion_scale


@pytest.mark.parametrize("factor", [0.0, 0.3, 2.0])
@pytest.mark.parametrize("order", ["forward", "reversed"])
def test_torsion_scale_removes_that_torsion_energy(latch_system, factor, order):
    ff = latch_system.force_field
    atoms = LATCH_SLOW if order == "forward" else LATCH_SLOW[::-1]
    k_before = ff.torsion_k.copy()
    scaled = ff.with_torsion_scale(atoms, factor)
    x = _latch_turned(latch_system, 6, seed=1)

    e0, f0 = ff.energy_forces(x)
    e1, f1 = scaled.energy_forces(x)
    own = _latch_torsion_energy(x)
    assert np.ptp(own) > 10.0  # the dihedral covers the circle: the term is far from zero
    np.testing.assert_allclose(e1, e0 - (1.0 - factor) * own, rtol=0, atol=1e-9)
    # Forces change by (1 - factor) times that torsion's own force, which is
    # minus the finite-difference gradient of the hand-computed energy.
    own_forces = -_central_difference(_latch_torsion_energy, x)
    np.testing.assert_allclose(f0 - f1, (1.0 - factor) * own_forces,
                               atol=1e-5 * max(1.0, np.abs(own_forces).max()))
    # A single configuration agrees with the stack.
    assert scaled.energy(x[0]) == pytest.approx(e1[0], abs=1e-9)

    # Only the slow torsion's amplitude changed, and the original is untouched.
    match = np.all(ff.torsions == np.array(LATCH_SLOW), axis=1)
    assert match.sum() == 1
    np.testing.assert_array_equal(ff.torsion_k, k_before)
    np.testing.assert_array_equal(scaled.torsion_k[~match], k_before[~match])
    assert scaled.torsion_k[match][0] == pytest.approx(factor * LATCH_K)
    e0_again, f0_again = ff.energy_forces(x)
    np.testing.assert_array_equal(e0_again, e0)
    np.testing.assert_array_equal(f0_again, f0)
    assert scaled is not ff


def test_torsion_scale_reversed_order_is_the_same_copy(latch_system):
    ff = latch_system.force_field
    x = _jiggled_stack(latch_system, 4, seed=2)
    forward = ff.with_torsion_scale(LATCH_SLOW, 0.25)
    backward = ff.with_torsion_scale(tuple(reversed(LATCH_SLOW)), 0.25)
    np.testing.assert_array_equal(forward.torsion_k, backward.torsion_k)
    np.testing.assert_array_equal(forward.energy(x), backward.energy(x))


def test_torsion_scale_scales_every_row_of_a_sum_and_keeps_the_bias():
    # Two cosines about one dihedral (one row listed reversed), one other torsion.
    ff = ToyForceField(5, torsions=[(0, 1, 2, 3), (3, 2, 1, 0), (1, 2, 3, 4)],
                       torsion_k=[3.0, 5.0, 7.0], torsion_n=[1, 2, 3],
                       torsion_delta=[0.0, 0.5, 1.0])

    def pull(x):
        return 0.0, np.zeros_like(x)

    biased = ff.with_bias(pull)
    scaled = biased.with_torsion_scale((0, 1, 2, 3), 0.5)
    np.testing.assert_allclose(scaled.torsion_k, [1.5, 2.5, 7.0])
    assert scaled.bias is pull
    np.testing.assert_allclose(ff.torsion_k, [3.0, 5.0, 7.0])


def test_torsion_scale_errors(latch_system):
    ff = latch_system.force_field
    with pytest.raises(ValueError, match=r"no torsion term is about atoms \(2, 3, 4, 6\)"):
        ff.with_torsion_scale((2, 3, 4, 6), 0.5)
    with pytest.raises(ValueError, match="no torsion term"):
        ff.with_torsion_scale((2, 4, 3, 5), 0.5)  # not the same dihedral
    with pytest.raises(ValueError, match="no torsion term"):
        ToyForceField(4).with_torsion_scale((0, 1, 2, 3), 0.5)  # no torsions at all
    with pytest.raises(ValueError, match="4 atom indices"):
        ff.with_torsion_scale((2, 3, 4), 0.5)
    with pytest.raises(ValueError, match="finite"):
        ff.with_torsion_scale(LATCH_SLOW, float("nan"))


def test_stack_bias_with_wrong_shapes_is_refused(latch_system):
    """A stack-capable bias returning one scalar energy for a stack is an error, not a
    silent broadcast."""
    def bad(x):
        return 0.0, np.zeros(np.shape(x))

    bad.accepts_stacks = True
    ff = latch_system.force_field.with_bias(bad)
    x = np.stack([latch_system.states["closed"]] * 3)
    with pytest.raises(ValueError, match=r"energies of shape \(3,\)"):
        ff.energy_forces(x)


# --------------------------------------------------------------------------
# The stack path of the bias hook


class _Restraint:
    """Harmonic restraint on every atom, vectorized over any leading axes; counts calls."""

    def __init__(self, reference, k=50.0, stacks=True):
        self.reference = np.asarray(reference)
        self.k = k
        self.shapes = []
        if stacks is not None:
            self.accepts_stacks = stacks

    def __call__(self, x):
        self.shapes.append(np.shape(x))
        d = np.asarray(x) - self.reference
        energy = 0.5 * self.k * (d * d).sum(axis=(-2, -1))
        # An atom-dependent weight too, so that mixing up configurations shows.
        energy = energy + (np.arange(d.shape[-2])[:, None] * d).sum(axis=(-2, -1))
        forces = -self.k * d - np.arange(d.shape[-2])[:, None] * np.ones(3)
        return (float(energy) if np.ndim(energy) == 0 else energy), forces


@pytest.mark.parametrize("lead", [(5,), (2, 3)])
def test_stack_bias_is_called_once_and_matches_per_configuration(latch_system, lead):
    ref = latch_system.states["closed"]
    x = _jiggled_stack(latch_system, int(np.prod(lead)), seed=3).reshape(lead + ref.shape)
    stack_bias = _Restraint(ref, stacks=True)
    plain_bias = _Restraint(ref, stacks=None)  # no accepts_stacks attribute
    e_stack, f_stack = latch_system.force_field.with_bias(stack_bias).energy_forces(x)
    assert stack_bias.shapes == [x.shape]  # exactly one call, with the whole stack

    ff_plain = latch_system.force_field.with_bias(plain_bias)
    e_plain, f_plain = ff_plain.energy_forces(x)
    assert plain_bias.shapes == [ref.shape] * int(np.prod(lead))
    assert e_stack.shape == lead and f_stack.shape == x.shape
    np.testing.assert_allclose(e_stack, e_plain, rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(f_stack, f_plain, rtol=1e-12, atol=1e-9)

    # And both equal evaluating each configuration on its own.
    flat = x.reshape((-1,) + ref.shape)
    singles = [ff_plain.energy_forces(xi) for xi in flat]
    np.testing.assert_allclose(e_stack.ravel(), [e for e, _ in singles], rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(f_stack.reshape(flat.shape), np.stack([f for _, f in singles]),
                               rtol=1e-12, atol=1e-9)
    # The bias adds exactly its own terms.
    e_bare, f_bare = latch_system.force_field.energy_forces(x)
    e_b, f_b = _Restraint(ref)(x)
    np.testing.assert_allclose(e_stack - e_bare, e_b, atol=1e-9)
    np.testing.assert_allclose(f_stack - f_bare, f_b, atol=1e-9)


def test_false_accepts_stacks_and_single_configurations(latch_system):
    ref = latch_system.states["open"]
    x = _jiggled_stack(latch_system, 3, seed=4)
    off = _Restraint(ref, stacks=False)
    latch_system.force_field.with_bias(off).energy_forces(x)
    assert off.shapes == [ref.shape] * 3  # a false attribute keeps the per-configuration calls
    on = _Restraint(ref, stacks=True)
    e, f = latch_system.force_field.with_bias(on).energy_forces(x[0])
    assert on.shapes == [ref.shape]  # a single configuration: one plain call
    assert isinstance(e, float) and f.shape == ref.shape


def test_stack_bias_calls_in_a_walker_run(latch_system):
    """In a Langevin run of several walkers: one bias call per energy_forces call."""

    class Counted:
        def __init__(self, ff):
            self.ff = ff
            self.calls = 0

        def energy_forces(self, x):
            self.calls += 1
            return self.ff.energy_forces(x)

    ref = latch_system.states["closed"]
    bias = _Restraint(ref, stacks=True)
    ff = Counted(latch_system.force_field.with_bias(bias))
    integ = LangevinBAOAB(ff, latch_system.masses, temperature=T, friction=5.0,
                          md_step_ps=0.002, seed=0)
    x0 = np.stack([ref, latch_system.states["open"], ref])
    integ.run(x0, 10, report_interval=5)
    assert ff.calls >= 10
    assert bias.shapes == [x0.shape] * ff.calls


# --------------------------------------------------------------------------
# spec_cv


@pytest.mark.parametrize("state", ["closed", "open"])
def test_spec_cv_equals_dihedral_cv(latch_system, state):
    spec = _dihedral_spec(latch_system, LATCH_SLOW)
    cv = spec_cv(spec)
    assert cv.accepts_stacks is True
    ref = dihedral_cv(LATCH_SLOW)
    x = _jiggled_stack(latch_system, 6, scale=0.02, seed=5, states=[state])

    values, grads = cv(x)
    assert values.shape == (6,) and grads.shape == x.shape
    for xi, vi, gi in zip(x, values, grads):
        v1, g1 = cv(xi)  # one configuration
        assert isinstance(v1, float) and g1.shape == xi.shape
        v_ref, g_ref = ref(xi)
        # Same angle (on the circle: near +-pi the two may pick different branches).
        assert abs(_wrapped(v1 - v_ref)) < 1e-10
        assert abs(_wrapped(vi - v_ref)) < 1e-10
        np.testing.assert_allclose(g1, g_ref, rtol=1e-9, atol=1e-9)
        np.testing.assert_allclose(gi, g_ref, rtol=1e-9, atol=1e-9)
        others = np.ones(xi.shape[0], dtype=bool)
        others[list(LATCH_SLOW)] = False
        assert np.all(gi[others] == 0.0)
    if state == "closed":  # far from the branch cut: plainly equal
        np.testing.assert_allclose(values, [ref(xi)[0] for xi in x], rtol=0, atol=1e-10)
    # A stack with two leading axes.
    v2, g2 = cv(x.reshape((2, 3) + x.shape[1:]))
    np.testing.assert_allclose(v2.ravel(), values, rtol=0, atol=1e-12)
    np.testing.assert_allclose(g2.reshape(x.shape), grads, rtol=0, atol=1e-12)


def test_spec_cv_cos_transform_gradient_matches_finite_differences(latch_system):
    spec = _dihedral_spec(latch_system, LATCH_SLOW, transform="cos", center=0.3, scale=0.5,
                          weight=2.0)
    cv = spec_cv(spec)
    x = _jiggled_stack(latch_system, 4, scale=0.02, seed=6)
    values, grads = cv(x)
    phi = dihedral_angles(x, [LATCH_SLOW])[..., 0]
    np.testing.assert_allclose(values, 2.0 * (np.cos(phi) - 0.3) / 0.5, atol=1e-10)
    fd = _central_difference(lambda y: cv(y)[0], x)
    np.testing.assert_allclose(grads, fd, atol=1e-6 * max(1.0, np.abs(fd).max()))
    assert np.abs(grads).max() > 0.1  # not trivially zero
    v1, g1 = cv(x[1])
    assert v1 == pytest.approx(values[1], abs=1e-12)
    np.testing.assert_allclose(g1, grads[1], atol=1e-12)


# --------------------------------------------------------------------------
# WellTemperedBias on stacks


def test_well_tempered_bias_on_stacks(latch_system):
    spec = _dihedral_spec(latch_system, LATCH_SLOW)
    bias = _wt_bias(spec_cv(spec))
    assert bias.accepts_stacks is True
    assert _wt_bias(dihedral_cv(LATCH_SLOW)).accepts_stacks is False
    rng = np.random.default_rng(7)
    for c in rng.uniform(-np.pi, np.pi, 40):
        bias.deposit(c)
    x = _jiggled_stack(latch_system, 6, scale=0.05, seed=8)

    energies, forces = bias(x)
    assert isinstance(energies, np.ndarray) and energies.shape == (6,)
    assert forces.shape == x.shape
    assert np.all(energies > 0.0)
    for xi, ei, fi in zip(x, energies, forces):
        e1, f1 = bias(xi)
        assert isinstance(e1, float)
        assert e1 == pytest.approx(ei, rel=1e-12, abs=1e-12)
        np.testing.assert_allclose(f1, fi, rtol=1e-12, atol=1e-12)
    fd = -_central_difference(lambda y: bias(y)[0], x)
    np.testing.assert_allclose(forces, fd, atol=1e-5 * max(1.0, np.abs(fd).max()))
    assert np.abs(forces).max() > 1.0  # a real force, not zero

    # Through the force-field hook: a stack equals the configurations one by one.
    ff = latch_system.force_field.with_bias(bias)
    e_stack, f_stack = ff.energy_forces(x)
    singles = [ff.energy_forces(xi) for xi in x]
    np.testing.assert_allclose(e_stack, [e for e, _ in singles], rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(f_stack, np.stack([f for _, f in singles]), rtol=1e-12,
                               atol=1e-9)


# --------------------------------------------------------------------------
# run_biased: the stack fast path and observe=


class _StackCV:
    """spec_cv, recording the shapes it is called with."""

    accepts_stacks = True

    def __init__(self, cv):
        self.cv = cv
        self.ndims = set()

    def __call__(self, x):
        self.ndims.add(np.ndim(x))
        return self.cv(x)


class _PlainCV:
    """The same CV without ``accepts_stacks``: one configuration at a time."""

    def __init__(self, cv):
        self.cv = cv
        self.ndims = set()

    def __call__(self, x):
        self.ndims.add(np.ndim(x))
        return self.cv(x)


def test_run_biased_fast_path_changes_nothing(torsion_system):
    system = torsion_system
    spec = _dihedral_spec(system, system.slow_dihedral)
    x0 = np.stack([system.states["trans"], system.states["cis"]] * 2)
    runs, cvs = [], []
    for wrap in (_StackCV, _PlainCV):
        cv = wrap(spec_cv(spec))
        bias = _wt_bias(cv, interval_steps=50, height=1.0)
        runs.append(run_biased(system, x0, 1500, bias=bias, friction=2.0, md_step_ps=0.005,
                               seed=13, report_interval=10))
        cvs.append(cv)
    fast, slow = runs
    assert cvs[0].ndims == {3, 4}  # walker stacks (forces) and frame stacks (deposits)
    assert cvs[1].ndims == {2}     # one configuration at a time
    assert fast.cv.shape == (1500 // 10, 4)
    np.testing.assert_array_equal(fast.cv, slow.cv)
    np.testing.assert_array_equal(fast.bias.centers, slow.bias.centers)
    np.testing.assert_array_equal(fast.bias.values, slow.bias.values)
    np.testing.assert_array_equal(fast.positions, slow.positions)
    assert fast.bias.n_kernels == 4 * (1500 // 50)
    # Kernels sit at the CV of the last reported frame of each interval, walker order.
    np.testing.assert_allclose(_wrapped(fast.bias.centers - fast.cv[4::5].ravel()), 0.0,
                               atol=1e-12)
    assert fast.observed is None


def test_run_biased_observe(torsion_system):
    system = torsion_system
    x0 = np.stack([system.states["trans"], system.states["cis"]] * 2)
    bias = _wt_bias(dihedral_cv(system.slow_dihedral), interval_steps=50)
    run = run_biased(system, x0, 1000, bias=bias, friction=2.0, md_step_ps=0.005, seed=5,
                     report_interval=10, observe=system.slow_angle)
    assert run.observed.shape == (100, 4) == run.cv.shape
    np.testing.assert_allclose(_wrapped(run.observed - run.cv), 0.0, atol=1e-10)
    assert np.ptp(run.observed) > 0.1  # the dihedral moved

    # Observing leaves the run itself unchanged.
    plain = run_biased(system, x0, 1000, bias=_wt_bias(dihedral_cv(system.slow_dihedral),
                                                       interval_steps=50),
                       friction=2.0, md_step_ps=0.005, seed=5, report_interval=10)
    np.testing.assert_array_equal(plain.cv, run.cv)

    # One walker: shape (n_reports,); another observable: the end-to-end distance.
    def distance(frames):
        return np.linalg.norm(frames[..., 3, :] - frames[..., 0, :], axis=-1)

    single = run_biased(system, system.states["cis"], 500,
                        bias=_wt_bias(dihedral_cv(system.slow_dihedral), interval_steps=50),
                        friction=2.0, md_step_ps=0.005, seed=6, report_interval=25,
                        observe=distance)
    assert single.observed.shape == (20,) == single.cv.shape
    assert np.all((single.observed > 0.1) & (single.observed < 0.5))


# --------------------------------------------------------------------------
# softened_delta_f


@pytest.mark.parametrize("factor, min_transitions", [(0.0, 200), (0.5, 20)])
def test_softened_delta_f_recovers_the_quadrature(torsion_system, factor, min_transitions):
    system = torsion_system
    reference = _reference(system)
    assert reference == pytest.approx(3.85, abs=0.01)
    ref = softened_delta_f(system, 20000, temperature=T, friction=2.0, md_step_ps=0.005,
                           factor=factor, n_walkers=8, seed=21)
    assert isinstance(ref, SoftenedReference)
    assert ref.states == ("cis", "trans")
    assert ref.stderr > 0.0 and np.isfinite(ref.stderr)
    print(f"factor {factor}: {ref.delta_f:.2f} +- {ref.stderr:.2f} kJ/mol "
          f"(reference {reference:.2f}), {ref.n_transitions} transitions, "
          f"{ref.effective_samples:.0f} effective frames")
    assert abs(ref.delta_f - reference) < max(0.5, 4.0 * ref.stderr)
    assert ref.n_transitions >= min_transitions
    n_frames = 8 * (20000 // 50 - int(0.1 * (20000 // 50)))
    assert 1.0 <= ref.effective_samples <= n_frames


def test_softened_delta_f_unscaled_is_plain_counting(torsion_system):
    """factor=1 samples the true force field: all weights 1, plain population counting."""
    system = torsion_system
    ref = softened_delta_f(system, 2000, temperature=T, friction=2.0, md_step_ps=0.005,
                           factor=1.0, n_walkers=4, seed=3)
    n_frames = 4 * (2000 // 50 - int(0.1 * (2000 // 50)))
    assert ref.effective_samples == pytest.approx(n_frames, rel=1e-12)


def test_softened_delta_f_is_reproducible_and_states_order(torsion_system):
    system = torsion_system
    kw = dict(temperature=T, friction=2.0, md_step_ps=0.005, n_walkers=4, seed=9)
    a = softened_delta_f(system, 3000, **kw)
    b = softened_delta_f(system, 3000, **kw)
    assert a == b  # dataclass equality: every field identical
    c = softened_delta_f(system, 3000, states=("trans", "cis"), **kw)
    assert c.states == ("trans", "cis")
    # Walkers start alternately in the given states, so this is a different run;
    # the sign convention F_A - F_B still holds.
    assert c.delta_f == pytest.approx(-_reference(system), abs=max(1.5, 4 * c.stderr))


def test_softened_delta_f_rejects_bad_arguments(torsion_system):
    system = torsion_system
    kw = dict(temperature=T, friction=2.0, md_step_ps=0.005)
    with pytest.raises(ValueError, match="n_walkers"):
        softened_delta_f(system, 1000, n_walkers=1, **kw)
    with pytest.raises(ValueError, match="fewer than 2 frames"):
        softened_delta_f(system, 50, n_walkers=2, **kw)  # one frame per walker
    with pytest.raises(ValueError, match="fewer than 2 frames"):
        softened_delta_f(system, 0, n_walkers=2, **kw)
    with pytest.raises(ValueError, match="fewer than 2 frames"):
        softened_delta_f(system, 1000, n_walkers=2, discard=0.99, **kw)
