"""Drift fit on synthetic data, and a classical water box at 1 fs through the report's function."""
import numpy as np
import openmm
import openmm.app as app
import openmm.unit as unit
import pytest

from mlbridge.build import BuiltSystem
from mlbridge.drift import (DRIFT_THRESHOLD_KT_PER_NS_PER_DOF, EnergyTraceReporter, check_setup,
                            degrees_of_freedom, fit_drift)
from mlbridge.solvate import system_options
from mlbridge.units import kT_kjmol


def test_fit_recovers_known_slope():
    rng = np.random.default_rng(7)
    t_ps = np.linspace(0, 50, 501)
    slope = 200.0  # kJ/mol/ns
    kin = 5000 + rng.normal(0, 30, t_ps.size)
    e = -1000.0 + slope * t_ps * 1e-3 + rng.normal(0, 0.5, t_ps.size)
    fit = fit_drift(t_ps, e, n_dof=1000, temperature_k=300, kinetic_kjmol=kin)
    assert fit.slope_kjmol_per_ns == pytest.approx(slope, abs=4 * fit.slope_stderr_kjmol_per_ns)
    assert fit.slope_stderr_kjmol_per_ns < 2.0  # analytic: 0.5 / sqrt(501 * 0.05**2 / 12) = 1.55
    assert fit.slope_kjmol_per_ns_per_dof == pytest.approx(fit.slope_kjmol_per_ns / 1000)
    assert fit.slope_kT_per_ns_per_dof == pytest.approx(fit.slope_kjmol_per_ns / 1000 / kT_kjmol(300))
    assert fit.fluctuation_ratio == pytest.approx(0.5 / 30, rel=0.2)
    assert fit.duration_ps == pytest.approx(50)
    with pytest.raises(ValueError, match="at least 3"):
        fit_drift([0, 1], [0, 1], n_dof=1, temperature_k=300)


def _ar1(rng, n, phi, sigma):
    """AR(1) noise e_k = phi e_(k-1) + N(0, sigma^2), started in its stationary state."""
    e = np.empty(n)
    e[0] = rng.normal(0, sigma / np.sqrt(1 - phi * phi))
    kicks = rng.normal(0, sigma, n)
    for k in range(1, n):
        e[k] = phi * e[k - 1] + kicks[k]
    return e


def test_drift_error_accounts_for_correlated_residuals():
    # AR(1) residuals have statistical inefficiency g = (1 + phi) / (1 - phi) exactly (textbook
    # result for a first-order autoregressive process; 19 for phi = 0.9). With the correction,
    # a zero drift lies beyond 2 sigma in ~5% of runs; the least-squares error alone would put
    # it there in about half of them.
    rng = np.random.default_rng(11)
    phi, n, runs = 0.9, 1001, 200
    t_ps = np.arange(n) * 0.002
    beyond, beyond_white, gs = 0, 0, []
    for _ in range(runs):
        fit = fit_drift(t_ps, _ar1(rng, n, phi, 0.1), n_dof=100, temperature_k=300)
        gs.append(fit.statistical_inefficiency)
        beyond += abs(fit.slope_kjmol_per_ns) > 2 * fit.slope_stderr_kjmol_per_ns
        white = fit.slope_stderr_kjmol_per_ns / np.sqrt(fit.statistical_inefficiency)
        beyond_white += abs(fit.slope_kjmol_per_ns) > 2 * white
    assert np.median(gs) == pytest.approx((1 + phi) / (1 - phi), rel=0.3)
    assert beyond / runs < 0.12
    assert beyond_white / runs > 0.3


def water_box(n_side=2.4):
    ff = app.ForceField("amber14/tip3p.xml")
    m = app.Modeller(app.Topology(), [] * unit.nanometer)
    m.addSolvent(ff, boxSize=openmm.Vec3(n_side, n_side, n_side) * unit.nanometer)
    system = ff.createSystem(m.topology, **system_options(0.9))  # the options mlbridge builds with
    pos = np.array(m.getPositions().value_in_unit(unit.nanometer))
    return BuiltSystem(system=system, topology=m.topology, positions=pos, region=(), treatment="water-box",
                       metadata={"treatment_summary": "TIP3P water box"})


def test_classical_water_box_at_1fs_passes_threshold():
    """A TIP3P/PME box at 1 fs (rigid water) must conserve energy: the same check the report runs."""
    box = water_box()
    res = check_setup(box, dt_fs=1.0, equilibration_ps=1.0, nve_ps=6.0, threads=2, progress=False)
    assert res.fit.n_dof == degrees_of_freedom(box.system)
    assert res.passed, res.warnings
    assert abs(res.fit.slope_kT_per_ns_per_dof) < DRIFT_THRESHOLD_KT_PER_NS_PER_DOF
    assert res.fit.fluctuation_ratio < 0.05
    assert res.speed.ms_per_step > 0 and res.speed.ns_per_day > 0


def test_drifting_setup_gets_a_plain_warning():
    """A 4 fs step with flexible O-H... here: rigid water but a too-long step drifts."""
    box = water_box()
    res = check_setup(box, dt_fs=5.0, equilibration_ps=0.5, nve_ps=3.0, threads=2, progress=False,
                      threshold_kT_per_ns_per_dof=1e-4)
    assert not res.passed
    # either verdict ("drifts", or "unresolved: run longer") is a plain warning naming the threshold
    assert res.status in ("drifts", "unresolved")
    assert any("above the threshold" in w for w in res.warnings)


def test_reporter_works_in_a_users_simulation():
    box = water_box(2.0)
    sim = app.Simulation(box.topology, box.system, openmm.VerletIntegrator(0.001),
                         openmm.Platform.getPlatformByName("CPU"), {"Threads": "2"})
    sim.context.setPositions(box.positions * unit.nanometer)
    sim.minimizeEnergy(maxIterations=100)
    sim.context.setVelocitiesToTemperature(300 * unit.kelvin, 1)
    rep = EnergyTraceReporter(10)
    sim.reporters.append(rep)
    sim.step(200)
    tab = rep.table()
    assert len(tab["Time (ps)"]) == 20 and "Total Energy (kJ/mole)" in tab
    fit = rep.fit(n_dof=degrees_of_freedom(box.system), temperature_k=300)
    assert np.isfinite(fit.slope_kjmol_per_ns)


def test_qeq_over_polarisation_is_flagged():
    """A dipole in water above twice the vacuum dipole gets a plain warning; a modest rise none."""
    from types import SimpleNamespace

    from mlbridge.drift import QEQ_DIPOLE_RATIO_WARN, _summarise_extras

    def summary(ratio):
        res = SimpleNamespace(treatment="ml+d3+qeq", warnings=[], uncertainty=None, qeq=None)
        rows = [{"charges": [0.1, -0.1], "charges_vacuum": [0.05, -0.05], "dipole_debye": 6.0 * ratio,
                 "dipole_vacuum_debye": 6.0} for _ in range(3)]
        _summarise_extras(res, {"qeq": rows}, 2, 0.23)
        return res

    assert not summary(1.4).warnings
    flagged = summary(QEQ_DIPOLE_RATIO_WARN + 0.8).warnings
    assert len(flagged) == 1 and "over-polarise" in flagged[0] and "16.8 D in water" in flagged[0]
