"""The testbed's bias loop in OpenMM and its reference: forces, tables, reweighting, WHAM.

OpenMM (Eastman et al., PLoS Comput. Biol. 13, e1005659, 2017) evaluates the tabulated
bias on its Reference platform; the expected values come from the testbed's own grid
(:class:`~cvdesign.testbed.metad.WellTemperedBias`) and the spec's reference evaluator,
whose geometry is checked against mdtraj in tests/test_geometry.py.
"""

import mdtraj as md
import numpy as np
import pytest

openmm = pytest.importorskip("openmm")

from cvdesign import Spec  # noqa: E402
from cvdesign.testbed.amide import methylacetamide  # noqa: E402
from cvdesign.testbed.metad import WellTemperedBias  # noqa: E402
from cvdesign.testbed.openmm_metad import (bias_force, mbar_free_energies,  # noqa: E402
                                           reweighting_offset, run_openmm_biased,
                                           torsion_cycle_delta_f, torsion_energy,
                                           torsion_terms, update_bias_force)


@pytest.fixture(scope="module")
def molecule():
    return methylacetamide(np.pi)


def _spec(molecule, transform="cos", periodic=False):
    return Spec(name="omega", topology=molecule.mdtraj_topology,
                descriptors=[{"id": "w", "kind": "dihedral", "atoms": list(molecule.omega_atoms)}],
                terms=[{"descriptor": "w", "transform": transform, "center": 0.0, "scale": 1.0,
                        "weight": 1.0}], periodic=periodic)


def _energy_forces(system, force, x):
    """Energy (kJ/mol) and forces (kJ/mol/nm) of `force` alone, on the Reference platform."""
    for f in system.getForces():
        f.setForceGroup(0)
    force.setForceGroup(1)
    system.addForce(force)
    context = openmm.Context(system, openmm.VerletIntegrator(0.001),
                             openmm.Platform.getPlatformByName("Reference"))
    context.setPositions(x)
    state = context.getState(getEnergy=True, getForces=True, groups={1})
    return (state.getPotentialEnergy()._value, np.array(state.getForces(asNumpy=True)._value),
            context)


def _random_geometry(molecule, rng):
    return molecule.positions + rng.normal(scale=0.01, size=molecule.positions.shape)


def test_builder_sets_omega_as_mdtraj_measures_it():
    """The internal-coordinate builder puts the dihedral where asked (mdtraj's
    compute_dihedrals as the reference; McGibbon et al., Biophys. J. 2015)."""
    for omega in (np.pi, 0.0, 1.0, -2.0):
        mol = methylacetamide(omega)
        traj = md.Trajectory(mol.positions[None], mol.mdtraj_topology)
        measured = md.compute_dihedrals(traj, [mol.omega_atoms])[0, 0]
        assert np.angle(np.exp(1j * (measured - omega))) == pytest.approx(0.0, abs=1e-5)
        assert mol.system.getNumParticles() == 12 and mol.topology.getNumBonds() == 11


def test_capped_proline_is_l_proline_with_omega_phi_psi_as_mdtraj_measures_them():
    """Ac-Pro-NHMe as built: omega, phi and psi where asked (mdtraj's compute_dihedrals
    and compute_phi/psi), L chirality at CA as in the adenylate kinase structure of the
    MDAnalysis test data (Beckstein et al., J. Mol. Biol. 2009), and the same structure
    twice (the hydrogens OpenMM's Modeller places at random are seeded)."""
    from MDAnalysisTests.datafiles import PDB_small

    from cvdesign.testbed.amide import capped_proline

    def chirality(xyz, top, residue):
        n, ca, c, cb = (residue.atom(name).index for name in ("N", "CA", "C", "CB"))
        return np.sign(np.dot(xyz[n] - xyz[ca], np.cross(xyz[c] - xyz[ca], xyz[cb] - xyz[ca])))

    adk = md.load(PDB_small)
    reference = {chirality(adk.xyz[0], adk.topology, r) for r in adk.topology.residues
                 if r.name != "GLY" and r.is_protein}
    assert len(reference) == 1
    for omega in (np.pi, 0.0):
        mol = capped_proline(omega, phi=-70.0, psi=140.0)
        traj = md.Trajectory(mol.positions[None], mol.mdtraj_topology)
        measured = md.compute_dihedrals(traj, [mol.omega_atoms])[0, 0]
        assert np.angle(np.exp(1j * (measured - omega))) == pytest.approx(0.0, abs=1e-5)
        assert np.degrees(md.compute_phi(traj)[1][0, 0]) == pytest.approx(-70.0, abs=1e-3)
        assert np.degrees(md.compute_psi(traj)[1][0, 0]) == pytest.approx(140.0, abs=1e-3)
        proline = traj.topology.residue(1)
        assert proline.name == "PRO"
        assert {chirality(mol.positions, traj.topology, proline)} == reference
        assert capped_proline(omega, phi=-70.0, psi=140.0).positions.tobytes() == \
            mol.positions.tobytes()


def test_bias_force_energy_and_forces_follow_the_grid_and_the_cv_gradient(molecule):
    rng = np.random.default_rng(11)
    spec = _spec(molecule)
    bias = WellTemperedBias(None, sigma=0.1, height=1.5, interval_steps=10, bias_factor=6.0,
                            temperature=300.0, grid=(-1.2, 1.2, 240))
    for s in rng.uniform(-1.0, 1.0, size=15):
        bias.deposit(s)
    x = _random_geometry(molecule, rng)
    s, grad = spec.evaluate(x[None], gradient=True)
    energy, forces, _ = _energy_forces(openmm.XmlSerializer.clone(molecule.system),
                                       bias_force(spec.to_openmm(periodic=False), bias), x)
    value, deriv = bias.bias_and_derivative(s[0])
    # OpenMM's natural spline and the grid's Hermite interpolant agree closely at a
    # spacing of sigma/20.
    assert energy == pytest.approx(float(value), abs=1e-4 * bias.values.max())
    np.testing.assert_allclose(forces, -float(deriv) * grad[0], atol=1e-3 * np.abs(forces).max())


def test_update_copies_new_kernels_into_the_context(molecule):
    spec = _spec(molecule)
    bias = WellTemperedBias(None, sigma=0.1, height=1.0, interval_steps=10, bias_factor=6.0,
                            temperature=300.0, grid=(-1.2, 1.2, 240))
    force = bias_force(spec.to_openmm(periodic=False), bias)
    x = molecule.positions
    s = float(spec.evaluate(x[None])[0])
    before, _, context = _energy_forces(openmm.XmlSerializer.clone(molecule.system), force, x)
    assert before == 0.0
    bias.deposit(s)
    update_bias_force(force, bias, [context])
    after = context.getState(getEnergy=True, groups={1}).getPotentialEnergy()._value
    assert after == pytest.approx(1.0, abs=1e-3)  # one full-height kernel at the CV value


def test_beyond_a_non_periodic_grid_the_bias_holds_its_edge_value_with_no_force(molecule):
    spec = _spec(molecule)  # cos(omega): near -1 in trans, near +1 in cis
    bias = WellTemperedBias(None, sigma=0.05, height=2.0, interval_steps=10, bias_factor=6.0,
                            temperature=300.0, grid=(-0.5, 0.5, 100))
    bias.deposit(-0.45)
    bias.deposit(0.42)
    for x, edge in ((molecule.positions, bias.values[0]),
                    (methylacetamide(0.0).positions, bias.values[-1])):
        energy, forces, _ = _energy_forces(openmm.XmlSerializer.clone(molecule.system),
                                           bias_force(spec.to_openmm(periodic=False), bias), x)
        assert energy == pytest.approx(float(edge), rel=1e-6)
        assert np.abs(forces).max() == 0.0


def test_a_non_finite_cv_reads_the_table_at_its_edge_instead_of_stopping_openmm(molecule):
    spec = _spec(molecule)
    bias = WellTemperedBias(None, sigma=0.05, height=2.0, interval_steps=10, bias_factor=6.0,
                            temperature=300.0, grid=(-1.2, 1.2, 100))
    bias.deposit(-1.2)
    x = molecule.positions.copy()
    x[:4] = np.nan  # the omega atoms
    energy, _, context = _energy_forces(openmm.XmlSerializer.clone(molecule.system),
                                        bias_force(spec.to_openmm(periodic=False), bias), x)
    assert not np.isfinite(context.getSystem().getForce(
        context.getSystem().getNumForces() - 1).getCollectiveVariableValues(context)[0])
    assert energy == pytest.approx(float(bias.values[0]), rel=1e-6)


def test_periodic_table_is_continuous_across_the_period(molecule):
    spec = _spec(molecule, transform="identity", periodic=True)
    bias = WellTemperedBias(None, sigma=0.2, height=1.0, interval_steps=10, bias_factor=6.0,
                            temperature=300.0, grid=(-np.pi, np.pi, 180), periodic=True)
    bias.deposit(np.pi)  # stored at -pi: both structures below are 0.02 rad from it
    force = bias_force(spec.to_openmm(periodic=False), bias)
    energies = []
    for omega in (np.pi - 0.02, -np.pi + 0.02):
        x = methylacetamide(omega).positions
        energy, _, _ = _energy_forces(openmm.XmlSerializer.clone(molecule.system),
                                      openmm.XmlSerializer.clone(force), x)
        energies.append(energy)
        assert energy == pytest.approx(float(bias.bias_at(omega)), abs=1e-4)
    assert energies[0] == pytest.approx(energies[1], abs=0.02)


def test_reweighting_offset_of_a_flat_bias_is_the_bias_itself():
    """c(t) = kT ln(<exp(gamma V/((gamma-1)kT))> / <exp(V/((gamma-1)kT))>) is V for a
    constant V (Tiwary and Parrinello, J. Phys. Chem. B 2015, from memory)."""
    bias = WellTemperedBias(None, sigma=0.1, height=1.0, interval_steps=1, bias_factor=5.0,
                            temperature=300.0, grid=(-1.0, 1.0, 50))
    bias.values[:] = 7.5
    assert reweighting_offset(bias, -1.0, 1.0) == pytest.approx(7.5, rel=1e-12)
    bias.values[:] = np.linspace(0.0, 3.0, bias.values.size)
    c = reweighting_offset(bias, -1.0, 1.0)
    assert 0.0 < c < 3.0  # between the smallest and the largest bias


def test_biased_run_is_deterministic_and_deposits_one_kernel_per_walker_and_interval(molecule):
    spec = _spec(molecule)
    runs = []
    for _ in range(2):
        bias = WellTemperedBias(None, sigma=0.05, height=1.0, interval_steps=20,
                                bias_factor=8.0, temperature=300.0, grid=(-1.2, 1.2, 120))
        x0 = np.stack([molecule.positions, methylacetamide(0.0).positions])
        runs.append(run_openmm_biased(molecule.system, spec.to_openmm(periodic=False), x0, 100,
                                      bias=bias, friction=1.0, md_step_ps=0.002, seed=4,
                                      report_interval=10, observe=molecule.omega,
                                      reference_cv=lambda x: spec.evaluate(x[None])[0]))
    a, b = runs
    assert a.cv.shape == (10, 2) and a.observed.shape == (10, 2) and a.bias.n_kernels == 10
    assert a.cv.tobytes() == b.cv.tobytes() and a.log_weights.tobytes() == b.log_weights.tobytes()
    assert a.cv_deviation < 1e-9  # OpenMM's CV is the spec's
    np.testing.assert_allclose(a.cv, np.cos(a.observed), atol=1e-9)


def test_biased_run_refuses_a_report_interval_that_does_not_divide_the_deposition(molecule):
    spec = _spec(molecule)
    bias = WellTemperedBias(None, sigma=0.05, height=1.0, interval_steps=20, bias_factor=8.0,
                            temperature=300.0, grid=(-1.2, 1.2, 120))
    with pytest.raises(ValueError, match=r"report_interval=7 must divide interval_steps=20"):
        run_openmm_biased(molecule.system, spec.to_openmm(periodic=False), molecule.positions,
                          40, bias=bias, friction=1.0, md_step_ps=0.002, seed=1,
                          report_interval=7)


def test_mbar_recovers_the_free_energy_of_harmonic_ensembles():
    """Samples of u_k = x**2 / (2 s_k**2) for three widths s_k: f_k - f_0 = ln(s_0 / s_k)
    (the Gaussian integral), within sampling error."""
    rng = np.random.default_rng(8)
    widths = np.array([1.0, 0.7, 0.5])
    x = np.concatenate([rng.normal(scale=s, size=4000) for s in widths])
    reduced = x[None, :] ** 2 / (2.0 * widths[:, None] ** 2)
    f, _ = mbar_free_energies(reduced, [4000] * 3)
    np.testing.assert_allclose(f, np.log(widths[0] / widths), atol=0.03)


def test_torsion_terms_are_the_proper_terms_about_the_amide_bond_and_their_energy(molecule):
    """The amide's proper torsions (impropers excluded), and their energy equal to OpenMM's
    for the same terms."""
    bond = molecule.omega_atoms[1:3]
    terms = torsion_terms(molecule.system, bond)
    assert len(terms) == 5 and all({t[1], t[2]} == set(bond) for t in terms)
    rng = np.random.default_rng(12)
    x = _random_geometry(molecule, rng)
    only = openmm.PeriodicTorsionForce()
    for i, j, k, l, n, phase, amp in terms:
        only.addTorsion(i, j, k, l, n, phase, amp)
    energy, _, _ = _energy_forces(openmm.XmlSerializer.clone(molecule.system), only, x)
    assert torsion_energy(x, terms) == pytest.approx(energy, rel=1e-9)
    assert torsion_energy(molecule.positions, terms) == pytest.approx(0.0, abs=1e-3)  # planar


def _cycle(molecule, **kw):
    cis = methylacetamide(0.0)
    args = dict(temperature=300.0, scales=(0.3, 1.0), n_frames=20, n_frames_low=40,
                n_repeats=2, equilibration_steps=100, seed=5)
    args.update(kw)
    return torsion_cycle_delta_f(molecule.system, {"cis": cis.positions,
                                                   "trans": [molecule.positions] * 2},
                                 molecule.omega_atoms[1:3], molecule.omega_atoms,
                                 molecule.wells, **args)


def test_torsion_cycle_is_reproducible_and_its_error_is_the_spread_of_its_repeats(molecule):
    """Tiny runs (no accuracy claimed): the same seed gives the same numbers, the cycle adds
    up, and the error bar is the standard error of the independent repeats."""
    ref = _cycle(molecule)
    again = _cycle(molecule)
    assert (ref.delta_f, ref.repeats, ref.error) == (again.delta_f, again.repeats, again.error)
    assert len(ref.repeats) == 2 and ref.repeats[0] != ref.repeats[1]
    assert ref.delta_f == pytest.approx(ref.delta_f_low + ref.switch_on["cis"]
                                        - ref.switch_on["trans"], abs=1e-9)
    assert ref.error == pytest.approx(abs(ref.repeats[0] - ref.repeats[1]) / 2.0, rel=1e-9)
    assert ref.scales == (0.3, 1.0) and ref.states == ("cis", "trans")
    assert _cycle(molecule, seed=6).delta_f != ref.delta_f


@pytest.mark.parametrize("kw, message", [
    ({"scales": (0.3, 0.9)}, r"scales=\(0\.3, 0\.9\) must increase from a value in \[0, 1\) to 1"),
    ({"scales": (0.5, 0.3, 1.0)}, r"must increase"),
    ({"n_repeats": 1}, r"n_repeats=1: at least 2 repeats are needed for the error"),
])
def test_torsion_cycle_refuses_bad_scales_and_a_single_repeat(molecule, kw, message):
    with pytest.raises(ValueError, match=message):
        _cycle(molecule, **kw)
