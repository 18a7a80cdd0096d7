"""Cost of the region terms inside OpenMM, measured side by side in one run (demo ligand,
padding 1.2 nm, ~1200 TIP3P waters, NVE at 1 fs, CPU platform, OpenMM at --threads threads,
torch at 1 thread).

Each system is run twice: with the region terms in the worker thread beside the classical forces
(mlbridge's default) and in series (``set_overlap(False)``, as MLBRIDGE_SERIAL_TERMS=1).

Prints:
- bridge overhead of `ml`: ms/step(ml) - ms/step(classical part alone) - ms(ANI term alone), as a
  fraction of ms(ANI term alone)   (target <= 5%), for both modes;
- a control: the same with a PythonForce that only busy-waits for as long as the ANI term takes
  (what any long callback costs on this machine, with no region code at all);
- the long-range layer (D3 + QEq) as a fraction of the ML term's cost (target <= 15%): terms alone
  on the same frames, terms as timed inside the OpenMM run, and ms/step(ml+d3+qeq) - ms/step(ml).
"Alone" is a direct call of each term's evaluate (unwrap + energy_forces) on the coordinates of
frames of the same trajectory, outside OpenMM, repeated; "inside the run" is the time spent in
the term's evaluation during the OpenMM run (its ledger).

    .venv/bin/python benchmarks/bench_region_cost.py [--steps 300] [--threads 2]
"""
import argparse
import time

import numpy as np
import openmm
import openmm.unit as unit
import torch

from mlbridge.build import apply_treatment, region_info
from mlbridge.demo import DEMO_LIGAND
from mlbridge.drift import classical_part, set_threads
from mlbridge.ligand import from_file
from mlbridge.region import bond_tree
from mlbridge.regionforce import RegionTermForce, ledger, region_forces, set_overlap
from mlbridge.solvate import solvate


def run(system, positions, threads, steps, keep_every=0):
    """ms/step of `steps` Verlet steps (after 20 warm-up steps), frames every keep_every steps,
    and {term name: ms per evaluation inside the run}."""
    integ = openmm.VerletIntegrator(0.001)
    ctx = openmm.Context(system, integ, openmm.Platform.getPlatformByName("CPU"), {"Threads": str(threads)})
    ctx.setPositions(positions * unit.nanometer)
    ctx.setVelocitiesToTemperature(300 * unit.kelvin, 1)
    integ.step(20)
    for _g, _m, key in region_forces(system):
        ledger(key).reset()
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
    inside = {ledger(k).name: ledger(k).ms_per_call for _g, _m, k in region_forces(system)}
    return 1000 * t / steps, frames, box, inside


def both_modes(system, positions, threads, steps, keep_every=0):
    """(overlapped, serial) results of run()."""
    out = []
    for overlap in (True, False):
        previous = set_overlap(overlap)
        try:
            out.append(run(system, positions, threads, steps, keep_every))
        finally:
            set_overlap(previous)
    return out


class BusyWait:
    """A PythonForce callable that reads the positions and spins for `ms`, returning zeros."""

    def __init__(self, n, ms):
        self.n, self.ms = n, ms

    def __call__(self, state):
        t0 = time.perf_counter()
        state.getPositions(asNumpy=True)
        while time.perf_counter() - t0 < self.ms / 1000.0:
            pass
        return 0.0, np.zeros((self.n, 3))


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


def pct(part, whole):
    return f"{100 * part / whole:6.1f}%"


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
          f"OpenMM CPU platform {a.threads} threads, torch {torch.get_num_threads()} thread(s)")
    ms_cl, _, _, _ = run(classical_part(ml.system), ml.positions, a.threads, a.steps)
    (ms_ml, frames, box, in_ml), (ms_ml_s, _, _, in_ml_s) = both_modes(ml.system, ml.positions, a.threads,
                                                                         a.steps, keep_every=10)
    (ms_full, _, _, in_full), (ms_full_s, _, _, in_full_s) = both_modes(full.system, full.positions,
                                                                          a.threads, a.steps)
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

    busy = openmm.XmlSerializer.clone(classical_part(ml.system))
    f = openmm.PythonForce(BusyWait(len(region), t_ani))
    f.setParticles(list(region))
    f.setUsesPeriodicBoundaryConditions(True)
    f.setForceGroup(1)
    busy.addForce(f)
    ms_busy, _, _, _ = run(busy, ml.positions, a.threads, a.steps)

    print()
    print(f"classical part alone          {ms_cl:8.2f} ms/step")
    print(f"ANI term alone                {t_ani:8.2f} ms/call")
    print(f"ml, terms beside classical    {ms_ml:8.2f} ms/step  (ANI inside the run {in_ml['ani1x']:.2f} ms)")
    print(f"ml, terms in series           {ms_ml_s:8.2f} ms/step  (ANI inside the run {in_ml_s['ani1x']:.2f} ms)")
    ov, ov_s, ov_b = ms_ml - ms_cl - t_ani, ms_ml_s - ms_cl - t_ani, ms_busy - ms_cl - t_ani
    print(f"bridge overhead, beside       {ov:+8.2f} ms/step = {pct(ov, t_ani)} of the ANI term (target <= 5%)")
    print(f"bridge overhead, in series    {ov_s:+8.2f} ms/step = {pct(ov_s, t_ani)} of the ANI term")
    print(f"control: busy-wait callback   {ms_busy:8.2f} ms/step, overhead {ov_b:+.2f} ms = {pct(ov_b, t_ani)} "
          "(a callback that only spins as long as the ANI term)")
    print()
    layer = t_d3 + t_qeq
    inside_layer = in_full_s["d3bj"] + in_full_s["qeq"]
    print(f"D3 term alone                 {t_d3:8.3f} ms/call   inside the run (series) {in_full_s['d3bj']:.3f}")
    print(f"QEq term alone                {t_qeq:8.3f} ms/call   inside the run (series) {in_full_s['qeq']:.3f}")
    print(f"layer (D3 + QEq) alone        {layer:8.3f} ms/step = {pct(layer, t_ani)} of the ANI term alone (target <= 15%)")
    print(f"layer inside the run (series) {inside_layer:8.3f} ms/step = {pct(inside_layer, in_full_s['ani1x'])} "
          f"of the ANI term inside the same run ({in_full_s['ani1x']:.2f} ms)")
    print(f"ml+d3+qeq, beside             {ms_full:8.2f} ms/step; - ml = {ms_full - ms_ml:+.2f} ms = "
          f"{pct(ms_full - ms_ml, t_ani)} of the ANI term")
    print(f"ml+d3+qeq, in series          {ms_full_s:8.2f} ms/step; - ml = {ms_full_s - ms_ml_s:+.2f} ms = "
          f"{pct(ms_full_s - ms_ml_s, t_ani)} of the ANI term")
    print(f"ml+d3+qeq terms inside the run, beside: "
          + ", ".join(f"{k} {v:.2f}" for k, v in in_full.items()) + " ms")


if __name__ == "__main__":
    main()
