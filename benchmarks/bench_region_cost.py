"""Cost of the region terms inside OpenMM, measured side by side in one run (demo ligand,
padding 1.2 nm, ~1200 TIP3P waters, NVE at 1 fs, CPU platform, OpenMM at --threads threads,
torch at 1 thread).

Each system is run twice: with the region terms in the worker thread beside the classical forces
(mlbridge's default) and in series (``set_overlap(False)``, as MLBRIDGE_SERIAL_TERMS=1). All
configurations are stepped in interleaved rounds and the medians are printed, so a change in the
machine's load hits them alike.

Prints:
- bridge overhead of `ml`: ms/step(ml) - ms/step(classical part alone) - ms(ANI term alone), as a
  fraction of ms(ANI term alone)   (target <= 5%), for both modes;
- a control: the same with a PythonForce that only busy-waits for as long as the ANI term takes
  (what any long callback costs on this machine, with no region code at all);
- the long-range layer (D3 + QEq) as a fraction of the ML term's cost (target <= 15%): terms alone
  on the same frames, terms as timed inside the OpenMM run, and ms/step(ml+d3+qeq) - ms/step(ml).
"Alone" is a direct call of each term's evaluate (unwrap + energy_forces) on 100 consecutive
1 fs frames of an `ml` trajectory (so neighbour lists are rebuilt as often as in MD), outside
OpenMM, three passes; "inside the run" is the time spent in
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


class Timed:
    """One Context of a system, stepped in chunks so several systems can be timed interleaved."""

    def __init__(self, system, positions, threads, overlap=True):
        self.system, self.overlap = system, overlap
        self.integ = openmm.VerletIntegrator(0.001)
        self.ctx = openmm.Context(system, self.integ, openmm.Platform.getPlatformByName("CPU"),
                                  {"Threads": str(threads)})
        self.ctx.setPositions(positions * unit.nanometer)
        self.ctx.setVelocitiesToTemperature(300 * unit.kelvin, 1)
        self.ms, self.inside = [], []
        self.chunk(20, record=False)

    def chunk(self, steps, record=True):
        previous = set_overlap(self.overlap)
        try:
            for _g, _m, key in region_forces(self.system):
                ledger(key).reset()
            t0 = time.perf_counter()
            self.integ.step(steps)
            dt = time.perf_counter() - t0
        finally:
            set_overlap(previous)
        if record:
            self.ms.append(1000 * dt / steps)
            self.inside.append({ledger(k).name: ledger(k).ms_per_call for _g, _m, k in region_forces(self.system)})

    def frames(self, n):
        out = []
        for _ in range(n):
            self.integ.step(1)
            out.append(self.ctx.getState(getPositions=True).getPositions(asNumpy=True).value_in_unit(unit.nanometer))
        return out, np.array(self.ctx.getState().getPeriodicBoxVectors().value_in_unit(unit.nanometer))

    @property
    def ms_per_step(self):
        return float(np.median(self.ms))

    def term_ms(self, name):
        return float(np.median([d[name] for d in self.inside]))


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
    inputs = [np.asarray(f)[idx] for f in frames]
    callable_.evaluate(inputs[0], box)  # warm-up
    seconds, n = 0.0, 0
    for _ in range(repeats):
        for k, x in enumerate(inputs if _ % 2 == 0 else inputs[::-1]):  # back and forth: no jumps
            t0 = time.perf_counter()
            callable_.evaluate(x, box)
            seconds += time.perf_counter() - t0
            n += 1
    return 1000 * seconds / n


def pct(part, whole):
    return f"{100 * part / whole:6.1f}%"


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--steps", type=int, default=300)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--rounds", type=int, default=5, help="interleaved rounds; medians are printed")
    a = ap.parse_args()
    set_threads(a.threads)
    solv = solvate(from_file(DEMO_LIGAND, name="LIG"))
    region = solv.region
    environment = tuple(i for i in range(solv.n_atoms) if i not in set(region))
    ml = apply_treatment(solv, "ml")
    full = apply_treatment(solv, "ml+d3+qeq")
    print(f"demo system: {solv.n_atoms} atoms, {solv.water_count()} waters; {a.steps} NVE steps at 1 fs per "
          f"configuration in {a.rounds} interleaved rounds (medians); "
          f"OpenMM CPU platform {a.threads} threads, torch {torch.get_num_threads()} thread(s)")
    busy_system = openmm.XmlSerializer.clone(classical_part(ml.system))
    busy_wait = BusyWait(len(region), 8.0)  # set to the ANI term's time below
    f = openmm.PythonForce(busy_wait)
    f.setParticles(list(region))
    f.setUsesPeriodicBoundaryConditions(True)
    f.setForceGroup(1)
    busy_system.addForce(f)
    runs = {
        "classical": Timed(classical_part(ml.system), ml.positions, a.threads),
        "ml beside": Timed(ml.system, ml.positions, a.threads, overlap=True),
        "ml series": Timed(ml.system, ml.positions, a.threads, overlap=False),
        "full beside": Timed(full.system, full.positions, a.threads, overlap=True),
        "full series": Timed(full.system, full.positions, a.threads, overlap=False),
        "busy": Timed(busy_system, ml.positions, a.threads),
    }
    frames, box = Timed(ml.system, ml.positions, a.threads, overlap=False).frames(100)
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

    busy_wait.ms = t_ani
    per_round = max(20, a.steps // a.rounds)
    for _ in range(a.rounds):  # interleaved: every configuration sees the same machine state
        for r in runs.values():
            r.chunk(per_round)
    ms_cl = runs["classical"].ms_per_step
    ms_ml, ms_ml_s = runs["ml beside"].ms_per_step, runs["ml series"].ms_per_step
    ms_full, ms_full_s = runs["full beside"].ms_per_step, runs["full series"].ms_per_step
    ms_busy = runs["busy"].ms_per_step
    in_ml = {"ani1x": runs["ml beside"].term_ms("ani1x")}
    in_ml_s = {"ani1x": runs["ml series"].term_ms("ani1x")}
    in_full = {k: runs["full beside"].term_ms(k) for k in ("ani1x", "d3bj", "qeq")}
    in_full_s = {k: runs["full series"].term_ms(k) for k in ("ani1x", "d3bj", "qeq")}
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
