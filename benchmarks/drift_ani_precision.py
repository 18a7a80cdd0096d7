"""Energy conservation of the ANI term in float32 and float64: the demo ligand alone in vacuum,
and (--medium water) the `ml` treatment of the demo system through the report's own check.

In water the ligand holds 60 of ~7,000 degrees of freedom, so a precision effect of the ML term
is diluted ~100x in the per-DOF drift and buried under the water's own scatter. Here every
degree of freedom feels only the ANI-1x ensemble: the ligand (X-H bonds constrained, as built),
NVT (Langevin, 1/ps, 300 K) for --nvt-ps, then NVE (velocity Verlet) for --nve-ps, total energy
every 10 steps, drift fitted by mlbridge's own ``fit_drift`` (with its autocorrelation-aware
error). Same seeds for both precisions, so the pairs start alike.

In water (--medium water) it runs ``check_setup`` on `ml` with the ANI term in each precision
(0.5 ps NVT + --nve-ps NVE, OpenMM at 2 threads, region terms beside the classical forces).

Results go to benchmarks/results/ani_precision_<medium>.json, one entry per (precision, dt, seed);
a rerun skips entries already there (resumable), so the study can be split over sessions.

    .venv/bin/python benchmarks/drift_ani_precision.py [--medium vacuum|water]
        [--precisions float32 float64] [--dts 0.5 1.0] [--seeds 1 2 3] [--nve-ps 10]
"""
import argparse
import fcntl
import json
import os
import time
from pathlib import Path

import numpy as np
import openmm
import openmm.unit as unit

from mlbridge.build import region_info
from mlbridge.demo import DEMO_LIGAND
from mlbridge.drift import EnergyTraceReporter, degrees_of_freedom, set_threads
from mlbridge.ligand import from_file
from mlbridge.solvate import solvate
from mlbridge.terms.ani import make_term
from mlbridge.units import kT_kjmol

RESULTS = Path(__file__).parent / "results"


class AniOnly:
    """PythonForce callable: the ANI term on the whole (vacuum) molecule."""

    def __init__(self, term):
        self.term, self.calls, self.seconds = term, 0, 0.0

    def __call__(self, state):
        x = np.array(state.getPositions(asNumpy=True)._value, dtype=float)
        t0 = time.perf_counter()
        r = self.term.energy_forces(x)
        self.seconds += time.perf_counter() - t0
        self.calls += 1
        return r.energy, r.region_forces


def vacuum_system(solv, precision):
    info = region_info(solv, with_environment=False)
    src = solv.system
    region = list(solv.region)
    local = {g: i for i, g in enumerate(region)}
    system = openmm.System()
    for g in region:
        system.addParticle(src.getParticleMass(g))
    for k in range(src.getNumConstraints()):
        i, j, d = src.getConstraintParameters(k)
        if i in local and j in local:
            system.addConstraint(local[i], local[j], d)
    ani = AniOnly(make_term(info, precision=precision))
    f = openmm.PythonForce(ani)
    f.setUsesPeriodicBoundaryConditions(False)
    system.addForce(f)
    system.addForce(openmm.CMMotionRemover())
    return system, solv.positions[region], ani


def run(solv, precision, dt_fs, seed, nvt_ps, nve_ps):
    system, x0, ani = vacuum_system(solv, precision)
    dt = dt_fs * 1e-3
    lang = openmm.LangevinMiddleIntegrator(300 * unit.kelvin, 1 / unit.picosecond, dt * unit.picoseconds)
    lang.setRandomNumberSeed(seed)
    verlet = openmm.VerletIntegrator(dt * unit.picoseconds)
    integ = openmm.CompoundIntegrator()
    integ.addIntegrator(lang)
    integ.addIntegrator(verlet)
    ctx = openmm.Context(system, integ, openmm.Platform.getPlatformByName("CPU"), {"Threads": "1"})
    ctx.setPositions(x0 * unit.nanometer)
    ctx.applyConstraints(1e-8)
    openmm.LocalEnergyMinimizer.minimize(ctx, 1.0, 200)
    ctx.setVelocitiesToTemperature(300 * unit.kelvin, seed)
    integ.setCurrentIntegrator(0)
    integ.step(int(round(nvt_ps / dt)))
    integ.setCurrentIntegrator(1)
    rep = EnergyTraceReporter(10)
    rep.record(ctx.getState(getEnergy=True))
    n = int(round(nve_ps / dt))
    t0 = time.perf_counter()
    for _ in range(n // 10):
        integ.step(10)
        rep.record(ctx.getState(getEnergy=True))
    wall = time.perf_counter() - t0
    n_dof = degrees_of_freedom(system)
    fit = rep.fit(n_dof=n_dof, temperature_k=300.0)
    kin = np.asarray(rep.kinetic)
    return {
        "precision": precision, "dt_fs": dt_fs, "seed": seed, "nvt_ps": nvt_ps, "nve_ps": nve_ps,
        "n_dof": n_dof,
        "drift_kT_per_ns_per_dof": fit.slope_kT_per_ns_per_dof,
        "drift_2sigma_kT_per_ns_per_dof": 2 * fit.slope_stderr_kjmol_per_ns / n_dof / kT_kjmol(300.0),
        "statistical_inefficiency": fit.statistical_inefficiency,
        "fluctuation_ratio": fit.fluctuation_ratio,
        "mean_temperature_k": float(2 * kin.mean() / (n_dof * 0.00831446261815324)),
        "ms_per_step": 1000 * wall / n,
        "ani_ms_per_call": 1000 * ani.seconds / max(ani.calls, 1),
    }


def run_water(solv, precision, dt_fs, seed, nvt_ps, nve_ps):
    from mlbridge.build import apply_treatment
    from mlbridge.drift import check_setup

    built = apply_treatment(solv, "ml", term_options={"ani": {"precision": precision}})
    r = check_setup(built, dt_fs=dt_fs, equilibration_ps=nvt_ps, nve_ps=nve_ps, threads=2,
                    report_interval=10, seed=seed, progress=False)
    return {
        "precision": precision, "dt_fs": dt_fs, "seed": seed, "nvt_ps": nvt_ps, "nve_ps": nve_ps,
        "n_dof": r.fit.n_dof,
        "drift_kT_per_ns_per_dof": r.fit.slope_kT_per_ns_per_dof,
        "drift_2sigma_kT_per_ns_per_dof": r.drift_2sigma_kT_per_ns_per_dof,
        "statistical_inefficiency": r.fit.statistical_inefficiency,
        "fluctuation_ratio": r.fit.fluctuation_ratio,
        "mean_temperature_k": None,  # not recorded by check_setup
        "ms_per_step": r.speed.ms_per_step,
        "ani_ms_per_call": r.speed.terms_ms.get("ani1x", float("nan")),
    }


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--precisions", nargs="+", default=["float32", "float64"])
    ap.add_argument("--dts", nargs="+", type=float, default=[0.5, 1.0])
    ap.add_argument("--seeds", nargs="+", type=int, default=[1, 2])
    ap.add_argument("--nvt-ps", type=float, default=2.0)
    ap.add_argument("--nve-ps", type=float, default=10.0)
    ap.add_argument("--medium", choices=["vacuum", "water"], default="vacuum")
    ap.add_argument("--out", type=Path, default=None)
    a = ap.parse_args()
    a.out = a.out or RESULTS / f"ani_precision_{a.medium}.json"
    if a.medium == "water" and a.nvt_ps == 2.0 and a.nve_ps == 10.0:  # the defaults are for vacuum
        a.nvt_ps, a.nve_ps = 0.5, 2.0
    set_threads(1)
    runner = run if a.medium == "vacuum" else run_water
    solv = solvate(from_file(DEMO_LIGAND, name="LIG"))
    done = json.loads(a.out.read_text()) if a.out.exists() else []
    key = lambda e: (e["precision"], e["dt_fs"], e["seed"], e["nve_ps"])  # noqa: E731
    have = {key(e) for e in done}
    for seed in a.seeds:
        for dt in a.dts:
            for p in a.precisions:
                if (p, dt, seed, a.nve_ps) in have:
                    continue
                e = runner(solv, p, dt, seed, a.nvt_ps, a.nve_ps)
                print(json.dumps(e), flush=True)
                a.out.parent.mkdir(parents=True, exist_ok=True)
                with open(a.out.with_suffix(".lock"), "w") as lock:  # several runners may append
                    fcntl.flock(lock, fcntl.LOCK_EX)
                    done = json.loads(a.out.read_text()) if a.out.exists() else []
                    done.append(e)
                    tmp = a.out.with_suffix(f".tmp{os.getpid()}")
                    tmp.write_text(json.dumps(done, indent=1) + "\n")
                    os.replace(tmp, a.out)  # atomic
    rows = json.loads(a.out.read_text())
    print(f"\n{'precision':9s} {'dt/fs':>5s} {'seed':>4s} {'drift kT/ns/DOF':>16s} {'+-2s':>8s} {'g':>6s} "
          f"{'T/K':>6s} {'ms/step':>8s} {'ANI ms':>7s}")
    for e in sorted(rows, key=key):
        print(f"{e['precision']:9s} {e['dt_fs']:5.2f} {e['seed']:4d} {e['drift_kT_per_ns_per_dof']:+16.4f} "
              f"{e['drift_2sigma_kT_per_ns_per_dof']:8.4f} {e['statistical_inefficiency']:6.1f} "
              f"{e['mean_temperature_k'] or float('nan'):6.1f} {e['ms_per_step']:8.2f} {e['ani_ms_per_call']:7.2f}")


if __name__ == "__main__":
    main()
