"""NVE drift and speed check (DESIGN.md section 8), and the reporter that measures it.

Protocol: minimise, equilibrate NVT (Langevin middle integrator, 1/ps), then run NVE with the
velocity Verlet / leapfrog ``VerletIntegrator`` at the chosen dt and record the total energy.

Drift is the slope of the least-squares line E_tot(t) = a + b t, reported as
b in kJ/mol/ns, b / N_dof in kJ/mol/ns per degree of freedom, and b / (N_dof k_B T) in kT/ns per
DOF, with N_dof = 3 N - N_constraints - 3 (the centre-of-mass motion is removed). The fluctuation
ratio std(E_tot - fit) / std(E_kin) tells how well the integrator resolves the fastest motion
(small is good; common practice: well below 0.05 at a sound timestep).

Error of the drift: the residuals of E_tot about the line are serially correlated (the
difference between the true and the integrator's shadow energy follows the slow motions), so
the least-squares standard error, which assumes independent samples, understates the scatter
from run to run (measured here: ~10x for 2 ps fits at 0.5 fs). The reported error is the
least-squares one times sqrt(g), g the statistical inefficiency of the residuals (1 + 2 tau,
tau their integrated autocorrelation time in samples; Chodera et al., J. Chem. Theory Comput.
3, 26 (2007), computed by ``pymbar.timeseries.statistical_inefficiency``), i.e. the error for
N/g effectively independent samples. Like any such estimate it can still be low when the run
is short compared with the slowest motion; a drift counts as resolved only beyond 2 errors.

A drift above :data:`DRIFT_THRESHOLD_KT_PER_NS_PER_DOF` is reported as a plain warning.
"""
from __future__ import annotations

import math
import time
from dataclasses import asdict, dataclass, field
from typing import Optional

import numpy as np
import openmm
import openmm.unit as unit

from .regionforce import is_region_force, ledger, overlap_enabled, region_forces
from .units import kT_kjmol

#: Drift threshold, kT/ns per degree of freedom. Common practice, an order of magnitude rather
#: than a published limit: classical TIP3P/PME in single/mixed precision at 1-2 fs drifts
#: around 1e-3 kT/ns/DOF or less, so 0.01 flags a setup ten times worse than a sound one.
DRIFT_THRESHOLD_KT_PER_NS_PER_DOF = 0.01

#: ANI ensemble disagreement threshold, kcal/mol per sqrt(atom): rho = std(E_members)/sqrt(N).
#: From memory: the active-learning criterion of Smith et al., J. Chem. Phys. 148, 241733 (2018)
#: used about 0.23 kcal/mol/sqrt(atom) to mark structures the ensemble is unsure about.
ENSEMBLE_SPREAD_THRESHOLD_KCAL_PER_SQRT_ATOM = 0.23


@dataclass(frozen=True)
class DriftFit:
    """Result of :func:`fit_drift`. Energies kJ/mol, time ns."""

    slope_kjmol_per_ns: float
    intercept_kjmol: float
    slope_kjmol_per_ns_per_dof: float
    slope_kT_per_ns_per_dof: float
    slope_stderr_kjmol_per_ns: float
    fluctuation_ratio: float
    n_dof: int
    temperature_k: float
    duration_ps: float
    #: of the residuals; the slope's error above already includes the factor sqrt(g)
    statistical_inefficiency: float = 1.0


def statistical_inefficiency(series) -> float:
    """g = 1 + 2 tau of a time series (>= 1), by pymbar (Chodera et al. 2007), quietly."""
    import logging

    quiet = logging.getLogger("pymbar")
    level = quiet.level
    quiet.setLevel(logging.ERROR)  # pymbar logs an optional-JAX notice and a caution on import
    try:
        from pymbar.timeseries import statistical_inefficiency as _g
    finally:
        quiet.setLevel(level)
    x = np.asarray(series, float)
    if x.size < 4 or not np.ptp(x) > 0:
        return 1.0
    return float(_g(x))


def fit_drift(times_ps, total_kjmol, *, n_dof: int, temperature_k: float,
              kinetic_kjmol=None) -> DriftFit:
    """Least-squares drift of the total energy (see module docstring for the definitions)."""
    t = np.asarray(times_ps, float) * 1e-3  # ns
    e = np.asarray(total_kjmol, float)
    if t.size < 3:
        raise ValueError(f"need at least 3 energy samples to fit a drift, got {t.size}; run longer")
    A = np.vstack([np.ones_like(t), t]).T
    coef, *_ = np.linalg.lstsq(A, e, rcond=None)
    a, b = float(coef[0]), float(coef[1])
    resid = e - (a + b * t)
    s2 = float(resid @ resid) / max(t.size - 2, 1)
    g = statistical_inefficiency(resid)
    stderr = math.sqrt(g * s2 / float(((t - t.mean()) ** 2).sum())) if t.size > 2 else float("nan")
    ratio = float("nan")
    if kinetic_kjmol is not None:
        sk = float(np.std(np.asarray(kinetic_kjmol, float)))
        ratio = float(np.std(resid)) / sk if sk > 0 else float("nan")
    return DriftFit(
        slope_kjmol_per_ns=b, intercept_kjmol=a, slope_kjmol_per_ns_per_dof=b / n_dof,
        slope_kT_per_ns_per_dof=b / n_dof / kT_kjmol(temperature_k),
        slope_stderr_kjmol_per_ns=stderr, fluctuation_ratio=ratio, n_dof=int(n_dof),
        temperature_k=float(temperature_k), duration_ps=float((t[-1] - t[0]) * 1e3),
        statistical_inefficiency=g,
    )


def degrees_of_freedom(system: openmm.System) -> int:
    """3 N (massive particles) - constraints - 3 if a CMMotionRemover is present."""
    n = sum(1 for i in range(system.getNumParticles()) if system.getParticleMass(i).value_in_unit(unit.dalton) > 0)
    dof = 3 * n - system.getNumConstraints()
    if any(isinstance(f, openmm.CMMotionRemover) for f in system.getForces()):
        dof -= 3
    return int(dof)


class EnergyTraceReporter:
    """OpenMM reporter recording time, potential, kinetic and total energy (kJ/mol) every
    ``reportInterval`` steps, plus the extras of mlbridge's region terms (ensemble spread,
    QEq charges). Use it in your own simulation::

        rep = EnergyTraceReporter(100)
        simulation.reporters.append(rep)
        simulation.step(10000)
        fit = rep.fit(n_dof=degrees_of_freedom(simulation.system), temperature_k=300)

    Columns of :meth:`table`: "Time (ps)", "Potential Energy (kJ/mole)", "Kinetic Energy
    (kJ/mole)", "Total Energy (kJ/mole)".
    """

    def __init__(self, reportInterval: int, system: Optional[openmm.System] = None):
        self._interval = int(reportInterval)
        self.times_ps, self.potential, self.kinetic = [], [], []
        self.term_extras: dict = {}
        self._keys = region_forces(system) if system is not None else None

    def describeNextReport(self, simulation):
        steps = self._interval - simulation.currentStep % self._interval
        return {"steps": steps, "periodic": None, "include": ["energy"]}

    def report(self, simulation, state):
        if self._keys is None:
            self._keys = region_forces(simulation.system)
        self.record(state)

    def record(self, state) -> None:
        """Append one sample from an OpenMM State that holds energies."""
        self.times_ps.append(state.getTime().value_in_unit(unit.picosecond))
        self.potential.append(state.getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole))
        self.kinetic.append(state.getKineticEnergy().value_in_unit(unit.kilojoule_per_mole))
        for _group, module, key in (self._keys or ()):
            extras = ledger(key).last_extras
            if extras:
                self.term_extras.setdefault(module, []).append(dict(extras))

    @property
    def total(self) -> list:
        return [p + k for p, k in zip(self.potential, self.kinetic)]

    def table(self) -> dict:
        return {"Time (ps)": self.times_ps, "Potential Energy (kJ/mole)": self.potential,
                "Kinetic Energy (kJ/mole)": self.kinetic, "Total Energy (kJ/mole)": self.total}

    def fit(self, *, n_dof: int, temperature_k: float) -> DriftFit:
        return fit_drift(self.times_ps, self.total, n_dof=n_dof, temperature_k=temperature_k,
                         kinetic_kjmol=self.kinetic)


@dataclass
class SpeedBreakdown:
    """Wall-clock cost per MD step, ms, at ``threads`` threads."""

    threads: int
    ms_per_step: float
    ns_per_day: float
    classical_ms_per_step: float
    terms_ms: dict = field(default_factory=dict)
    bridge_overhead_ms: float = 0.0
    #: region terms ran in the worker thread beside the classical forces (mlbridge.regionforce)
    overlap: bool = False
    #: time per step the result forces waited for the worker (part of ms_per_step)
    wait_ms: float = 0.0

    @property
    def terms_total_ms(self) -> float:
        return float(sum(self.terms_ms.values()))


@dataclass
class CheckResult:
    """Everything the NVE check measured (see :func:`check_setup`)."""

    treatment: str
    dt_fs: float
    temperature_k: float
    equilibration_ps: float
    nve_ps: float
    fit: DriftFit
    speed: SpeedBreakdown
    trace: dict
    threshold_kT_per_ns_per_dof: float
    uncertainty: dict = field(default_factory=dict)
    qeq: dict = field(default_factory=dict)
    warnings: list = field(default_factory=list)
    metadata: dict = field(default_factory=dict)

    @property
    def passed(self) -> bool:
        """The fitted drift is within the threshold."""
        return abs(self.fit.slope_kT_per_ns_per_dof) <= self.threshold_kT_per_ns_per_dof

    @property
    def drift_2sigma_kT_per_ns_per_dof(self) -> float:
        """Twice the least-squares error of the drift, kT/ns per DOF."""
        return 2.0 * self.fit.slope_stderr_kjmol_per_ns / self.fit.n_dof / kT_kjmol(self.temperature_k)

    @property
    def resolved(self) -> bool:
        """The drift is known well enough to judge: its 2-sigma error is below the threshold."""
        return self.drift_2sigma_kT_per_ns_per_dof <= self.threshold_kT_per_ns_per_dof

    @property
    def status(self) -> str:
        """"pass", "drifts" (above the threshold beyond its 2-sigma error) or "unresolved"."""
        if self.passed:
            return "pass"
        beyond = abs(self.fit.slope_kT_per_ns_per_dof) - self.drift_2sigma_kT_per_ns_per_dof
        return "drifts" if beyond > self.threshold_kT_per_ns_per_dof else "unresolved"

    def to_dict(self) -> dict:
        d = asdict(self)
        d["passed"] = self.passed
        d["status"] = self.status
        d["speed"]["terms_total_ms"] = self.speed.terms_total_ms
        return d


#: torch intra-op threads inside OpenMM runs. Measured on the 2-core development machine: with
#: 2 torch threads beside OpenMM's 2 CPU-platform threads, a loaded machine made one ANI call
#: take up to 780 ms instead of 12 ms (spinning thread pools competing); with 1 thread the cost
#: is stable and at most ~15% slower on an idle machine.
TORCH_THREADS = 1


def set_threads(threads: int) -> None:
    """Pin torch's intra-op threads to :data:`TORCH_THREADS` (at most ``threads``); OpenMM's CPU
    platform gets ``threads`` per context."""
    try:
        import torch
        torch.set_num_threads(max(1, min(int(threads), TORCH_THREADS)))
    except ImportError:  # pragma: no cover - torch is a dependency
        pass


def cpu_context(system: openmm.System, integrator, threads: int) -> openmm.Context:
    return openmm.Context(system, integrator, openmm.Platform.getPlatformByName("CPU"),
                          {"Threads": str(int(threads))})


def classical_part(system: openmm.System) -> openmm.System:
    """A copy of ``system`` without mlbridge's region forces (the classical part alone)."""
    copy = openmm.XmlSerializer.clone(system)
    for k in reversed(range(copy.getNumForces())):
        if is_region_force(copy.getForce(k)):
            copy.removeForce(k)
    return copy


def _progress(total: int, desc: str, enabled: bool):
    if not enabled:
        return None
    try:
        from tqdm import tqdm
        return tqdm(total=total, desc=desc, unit="step", leave=False, mininterval=1.0)
    except ImportError:  # pragma: no cover
        return None


def check_setup(built, *, dt_fs: float = 1.0, equilibration_ps: float = 2.0, nve_ps: float = 5.0,
                temperature_k: float = 300.0, threads: int = 2, report_interval: int = 10,
                threshold_kT_per_ns_per_dof: float = DRIFT_THRESHOLD_KT_PER_NS_PER_DOF,
                spread_threshold_kcal_per_sqrt_atom: float = ENSEMBLE_SPREAD_THRESHOLD_KCAL_PER_SQRT_ATOM,
                minimize: bool = True, seed: int = 2026, progress: bool = True) -> CheckResult:
    """Measure NVE drift and speed of a BuiltSystem.

    Parameters
    ----------
    dt_fs : NVE (and NVT) timestep, fs
    equilibration_ps, nve_ps : lengths, ps
    threads : CPU threads for OpenMM and torch (stated in the result)
    report_interval : steps between energy samples (and uncertainty records)
    threshold_kT_per_ns_per_dof : drift above this is a warning
    """
    set_threads(threads)
    dt = dt_fs * 1e-3
    system = built.system
    lang = openmm.LangevinMiddleIntegrator(temperature_k * unit.kelvin, 1.0 / unit.picosecond, dt * unit.picoseconds)
    lang.setRandomNumberSeed(seed)
    verlet = openmm.VerletIntegrator(dt * unit.picoseconds)
    integ = openmm.CompoundIntegrator()
    integ.addIntegrator(lang)
    integ.addIntegrator(verlet)
    ctx = cpu_context(system, integ, threads)
    ctx.setPositions(built.positions * unit.nanometer)
    if minimize:
        openmm.LocalEnergyMinimizer.minimize(ctx, 10.0, 100)
    ctx.setVelocitiesToTemperature(temperature_k * unit.kelvin, seed)
    n_eq = int(round(equilibration_ps / dt))
    n_nve = int(round(nve_ps / dt))
    bar = _progress(n_eq + n_nve, f"{built.treatment}: NVT+NVE", progress)
    integ.setCurrentIntegrator(0)
    done = 0
    while done < n_eq:
        k = min(200, n_eq - done)
        integ.step(k)
        done += k
        if bar:
            bar.update(k)
    integ.setCurrentIntegrator(1)
    keys = region_forces(system)
    for _g, _m, key in keys:
        ledger(key).reset()
    rep = EnergyTraceReporter(report_interval, system)
    ctx.setTime(0.0)
    rep.record(ctx.getState(getEnergy=True))
    clock = _ClassicalClock(system, ctx, dt, threads, n_nve, min(n_nve, 500)) if keys else None
    step_seconds, done = 0.0, 0
    while done < n_nve:
        k = min(report_interval, n_nve - done)
        t0 = time.perf_counter()
        integ.step(k)
        step_seconds += time.perf_counter() - t0
        done += k
        # (the energy evaluation calls the region forces once more; terms are timed per call)
        rep.record(ctx.getState(getEnergy=True))
        if clock:
            clock.after(done)
        if bar:
            bar.update(k)
    if bar:
        bar.close()
    terms_ms, wait_ms = {}, 0.0
    for _g, module, key in keys:
        book = ledger(key)
        terms_ms[book.name] = book.ms_per_call
        wait_ms += book.wait_ms_per_call if book.calls else 0.0
    ms_step = 1000.0 * step_seconds / max(n_nve, 1)
    classical_ms = clock.ms_per_step() if keys else ms_step
    speed = SpeedBreakdown(threads=threads, ms_per_step=ms_step,
                           ns_per_day=(dt * 1e-3) / (ms_step * 1e-3) * 86400.0,
                           classical_ms_per_step=classical_ms, terms_ms=terms_ms,
                           overlap=bool(keys) and overlap_enabled(), wait_ms=wait_ms)
    speed.bridge_overhead_ms = ms_step - classical_ms - speed.terms_total_ms if keys else 0.0
    n_dof = degrees_of_freedom(system)
    fit = rep.fit(n_dof=n_dof, temperature_k=temperature_k)
    result = CheckResult(treatment=built.treatment, dt_fs=dt_fs, temperature_k=temperature_k,
                         equilibration_ps=equilibration_ps, nve_ps=nve_ps, fit=fit, speed=speed,
                         trace=rep.table(), threshold_kT_per_ns_per_dof=threshold_kT_per_ns_per_dof,
                         metadata=dict(built.metadata))
    _summarise_extras(result, rep.term_extras, len(built.region), spread_threshold_kcal_per_sqrt_atom)
    if result.status == "unresolved":
        result.warnings.append(
            f"{built.treatment}: the drift {fit.slope_kT_per_ns_per_dof:.3g} ± "
            f"{result.drift_2sigma_kT_per_ns_per_dof:.2g} (2 sigma) kT/ns per DOF "
            f"at dt = {dt_fs} fs is above the threshold {threshold_kT_per_ns_per_dof} but not resolved from it: "
            f"the {nve_ps} ps NVE run is too short to judge. Run the check longer (--nve-ps)."
        )
    elif not result.passed:
        result.warnings.append(
            f"{built.treatment}: total energy drifts by {fit.slope_kT_per_ns_per_dof:.3g} kT/ns per DOF "
            f"({fit.slope_kjmol_per_ns:.3g} kJ/mol/ns) at dt = {dt_fs} fs, above the threshold "
            f"{threshold_kT_per_ns_per_dof} kT/ns per DOF: this setup does not conserve energy. "
            "Use a smaller timestep, check the region potential's forces, or run the check longer."
        )
    return result


class _ClassicalClock:
    """ms/step of the classical part alone, timed in pieces spread along the NVE run (so a change
    in the machine's load hits it and the run alike); a copy of the system without region
    forces, started from the run's state, NVE."""

    def __init__(self, system, ctx, dt, threads, n_nve: int, total_steps: int, pieces: int = 5):
        self.integ = openmm.VerletIntegrator(dt * unit.picoseconds)
        self.ctx = cpu_context(classical_part(system), self.integ, threads)
        self.ctx.setState(ctx.getState(getPositions=True, getVelocities=True))
        self.integ.step(10)
        self.piece_steps = max(10, total_steps // pieces)
        self.marks = [int(n_nve * (2 * i + 1) / (2 * pieces)) for i in range(pieces)]
        self.ms = []

    def after(self, done: int) -> None:
        """Time the pieces whose mark the run has passed (``done`` NVE steps so far)."""
        while self.marks and done >= self.marks[0]:
            self.marks.pop(0)
            t0 = time.perf_counter()
            self.integ.step(self.piece_steps)
            self.ms.append(1000.0 * (time.perf_counter() - t0) / self.piece_steps)

    def ms_per_step(self) -> float:
        self.after(10**12)
        return float(np.median(self.ms))


#: warn when the QEq dipole in water exceeds this multiple of the vacuum dipole. From memory,
#: as an order of magnitude: polarisable models raise dipoles in water by tens of percent (water
#: itself from 1.85 D in the gas to about 2.5-3 D in the liquid); doubling is a red flag.
QEQ_DIPOLE_RATIO_WARN = 2.0


def _summarise_extras(result: CheckResult, extras: dict, n_region: int, spread_threshold: float) -> None:
    from .units import KCAL_KJ
    for module, rows in extras.items():
        if rows and "member_energies_kjmol" in rows[0]:
            # sample std (ddof = 1), as the ANI term's extras and torchani's energies_qbcs
            std = np.array([np.std(np.asarray(r["member_energies_kjmol"], float), ddof=1) for r in rows])
            rho = std / KCAL_KJ / math.sqrt(n_region)
            result.uncertainty = {
                "samples": int(std.size),
                "stride_steps": None,
                "ensemble_std_kjmol_mean": float(std.mean()), "ensemble_std_kjmol_max": float(std.max()),
                "rho_kcal_per_sqrt_atom_mean": float(rho.mean()), "rho_kcal_per_sqrt_atom_max": float(rho.max()),
                "threshold_kcal_per_sqrt_atom": spread_threshold,
                "threshold_source": "from memory: ANI active-learning criterion, Smith et al. JCP 148, 241733 (2018)",
                "fraction_above_threshold": float(np.mean(rho > spread_threshold)),
                "trace_std_kjmol": std.tolist(),
            }
            if rho.max() > spread_threshold:
                result.warnings.append(
                    f"{result.treatment}: the ANI ensemble disagrees by up to {rho.max():.3g} kcal/mol/sqrt(atom) "
                    f"({100 * np.mean(rho > spread_threshold):.0f}% of samples above {spread_threshold}): the "
                    "potential is extrapolating for these structures; treat its energies with caution."
                )
        if rows and "charges_vacuum" in rows[0]:  # QEq (xTB's Mulliken charges are not QEq)
            q = np.array([r["charges"] for r in rows], float)
            result.qeq = {
                "samples": int(q.shape[0]),
                "charges_mean_e": q.mean(axis=0).tolist(),
                "charges_std_e": q.std(axis=0).tolist(),
                "charges_vacuum_e": list(map(float, rows[0].get("charges_vacuum", []))),
                "dipole_debye_mean": float(np.mean([r.get("dipole_debye", float("nan")) for r in rows])),
                "dipole_vacuum_debye": float(rows[0].get("dipole_vacuum_debye", float("nan"))),
            }
            mu_w, mu_v = result.qeq["dipole_debye_mean"], result.qeq["dipole_vacuum_debye"]
            if mu_v > 0 and mu_w > QEQ_DIPOLE_RATIO_WARN * mu_v:
                result.warnings.append(
                    f"{result.treatment}: QEq raises the ligand's dipole from {mu_v:.3g} D in vacuum to "
                    f"{mu_w:.3g} D in water ({mu_w / mu_v:.2g}x, warning above {QEQ_DIPOLE_RATIO_WARN}x): "
                    "QEq with these hardnesses is known to over-polarise, which strengthens the "
                    "ligand-water interaction; compare hydration structure with ml+d3 before trusting it."
                )
