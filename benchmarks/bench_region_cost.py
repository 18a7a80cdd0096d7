"""Cost of the region terms inside OpenMM, measured side by side in one run (demo ligand,
padding 1.2 nm, ~1000 TIP3P waters, NVE at 1 fs, CPU platform, 2 threads for OpenMM and torch).

Prints:
- bridge overhead of `ml`: ms/step(ml) - ms/step(classical part alone) - ms(ANI term alone),
  as a fraction of ms(ANI term alone)   (target <= 5%);
- cost of the long-range layer (D3 + QEq) per step as a fraction of the ML term's cost
  (target <= 15%).
Term costs "alone" are direct calls of each term's energy_forces on the coordinates of the
same trajectory, outside OpenMM.

    .venv/bin/python benchmarks/bench_region_cost.py [--steps 300] [--threads 2]
"""
import argparse
import time

import numpy as np
import torch
import openmm
import openmm.unit as unit

from mlbridge.build import apply_treatment, region_info
from mlbridge.region import bond_tree
from mlbridge.demo import DEMO_LIGAND
from mlbridge.drift import classical_part, set_threads
from mlbridge.ligand import from_file
from mlbridge.regionforce import RegionTermForce
from mlbridge.solvate import solvate


def run(system, positions, threads, steps, keep_every=0):
    integ = openmm.VerletIntegrator(0.001)
    ctx = openmm.Context(system, integ, openmm.Platform.getPlatformByName("CPU"), {"Threads": str(threads)})
    ctx.setPositions(positions * unit.nanometer)
    ctx.setVelocitiesToTemperature(300 * unit.kelvin, 1)
    integ.step(20)
    frames, t = [], 0.0
    chunk = keep_every or steps
    done = 0
    while done < steps:
        t0 = time.perf_counter()
        integ.step(chunk)
        t += time.perf_counter() - t0
        done += chunk
        if keep_every:
            frames.append(ctx.getState(getPositions=True).getPositions(asNumpy=True).value_in_unit(unit.nanometer))
    box = np.array(ctx.getState().getPeriodicBoxVectors().value_in_unit(unit.nanometer))
    return 1000 * t / steps, frames, box


def term_alone_ms(callable_: RegionTermForce, frames, region, environment, box, repeats=3):
    idx = list(region) + (list(environment) if callable_.uses_environment else [])
    callable_.evaluate(np.asarray(frames[0])[idx], box)  # warm-up
    t0 = time.perf_counter()
    n = 0
    for _ in range(repeats):
        for f in frames:
            callable_.evaluate(np.asarray(f)[idx], box)
            n += 1
    return 1000 * (time.perf_counter() - t0) / n


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--steps", type=int, default=300)
    ap.add_argument("--threads", type=int, default=2)
    a = ap.parse_args()
    set_threads(a.threads)
    solv = solvate(from_file(DEMO_LIGAND, name="LIG"))
    region = solv.region
    environment = tuple(i for i in range(solv.n_atoms) if i not in set(region))
    ml = apply_treatment(solv, "ml")
    full = apply_treatment(solv, "ml+d3+qeq")
    print(f"demo system: {solv.n_atoms} atoms, {solv.water_count()} waters; {a.steps} NVE steps at 1 fs; "
          f"{a.threads} threads for OpenMM's CPU platform, torch {torch.get_num_threads()}")
    ms_cl, _, _ = run(classical_part(ml.system), ml.positions, a.threads, a.steps)
    ms_ml, frames, box = run(ml.system, ml.positions, a.threads, a.steps, keep_every=10)
    ms_full, _, _ = run(full.system, full.positions, a.threads, a.steps)
    info = region_info(solv, with_environment=True)
    tree = bond_tree(info.n_atoms, info.bonds)
    calls = {}
    for t in full.metadata["terms"]:  # the same term specs the built system holds
        c = RegionTermForce(t["module"], t["options"], info, tree)
        c.uses_environment = c.term.uses_environment
        calls[t["module"]] = c
    t_ani = term_alone_ms(calls["ani"], frames, region, environment, box)
    t_d3 = term_alone_ms(calls["d3"], frames, region, environment, box)
    t_qeq = term_alone_ms(calls["qeq"], frames, region, environment, box)
    overhead = ms_ml - ms_cl - t_ani
    print(f"classical part alone   {ms_cl:8.2f} ms/step")
    print(f"ml                     {ms_ml:8.2f} ms/step")
    print(f"ANI term alone         {t_ani:8.2f} ms/call")
    print(f"bridge overhead (ml)   {overhead:8.2f} ms/step = {100 * overhead / t_ani:5.1f}% of the ANI term (target <= 5%)")
    print(f"ml+d3+qeq              {ms_full:8.2f} ms/step")
    print(f"D3 term alone          {t_d3:8.3f} ms/call")
    print(f"QEq term alone         {t_qeq:8.3f} ms/call")
    print(f"layer (D3 + QEq)       {t_d3 + t_qeq:8.3f} ms/step = {100 * (t_d3 + t_qeq) / t_ani:5.1f}% of the ML term (target <= 15%)")
    print(f"ml+d3+qeq - ml         {ms_full - ms_ml:8.2f} ms/step = {100 * (ms_full - ms_ml) / t_ani:5.1f}% of the ML term, measured in OpenMM")


if __name__ == "__main__":
    main()
