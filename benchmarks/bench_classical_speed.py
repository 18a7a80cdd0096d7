"""ms/step of the demo system (classical treatment) at 1 and 2 threads, and the ratio to a plain
TIP3P box of the same size, measured side by side in one run.

    .venv/bin/python benchmarks/bench_classical_speed.py [--steps 1000]
"""
import argparse
import time

import numpy as np
import openmm
import openmm.app as app
import openmm.unit as unit

from mlbridge.build import apply_treatment
from mlbridge.demo import DEMO_LIGAND
from mlbridge.ligand import from_file
from mlbridge.solvate import solvate, system_options


def ms_per_step(system, positions, threads, steps, dt_fs=1.0):
    integ = openmm.VerletIntegrator(dt_fs * 1e-3)
    ctx = openmm.Context(system, integ, openmm.Platform.getPlatformByName("CPU"), {"Threads": str(threads)})
    ctx.setPositions(positions * unit.nanometer)
    ctx.setVelocitiesToTemperature(300 * unit.kelvin, 1)
    integ.step(50)
    t0 = time.perf_counter()
    integ.step(steps)
    return 1000 * (time.perf_counter() - t0) / steps


def water_box_like(solv):
    """A pure TIP3P box with the demo system's box and (about) its atom count."""
    ff = app.ForceField("amber14/tip3p.xml")
    box = solv.box_vectors_nm()
    m = app.Modeller(app.Topology(), [] * unit.nanometer)
    m.addSolvent(ff, boxVectors=[openmm.Vec3(*v) * unit.nanometer for v in box])
    sys_ = ff.createSystem(m.topology, **system_options(solv.metadata["cutoff_nm"]))
    return sys_, np.array(m.getPositions().value_in_unit(unit.nanometer))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--steps", type=int, default=1000)
    a = ap.parse_args()
    solv = solvate(from_file(DEMO_LIGAND, name="LIG"))
    built = apply_treatment(solv, "classical")
    wsys, wpos = water_box_like(solv)
    print(f"demo system: {built.system.getNumParticles()} atoms; water box: {wsys.getNumParticles()} atoms; "
          f"{a.steps} NVE steps at 1 fs, CPU platform")
    for threads in (1, 2):
        d = ms_per_step(built.system, built.positions, threads, a.steps)
        w = ms_per_step(wsys, wpos, threads, a.steps)
        print(f"threads={threads}: demo {d:.2f} ms/step, water box {w:.2f} ms/step, ratio demo/water {d / w:.3f}")


if __name__ == "__main__":
    main()
