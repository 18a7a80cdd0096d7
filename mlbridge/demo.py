"""The built-in demo: the ligand of ``systems/demo`` through build + check for every treatment.

Scenario (invented for the demo): a small analgesic-like lead from a fictional fragment
campaign; before a week of sampling, the modeller wants to know which treatment conserves
energy at 1 fs and what each costs on a laptop.
"""
from __future__ import annotations

import time
from pathlib import Path

from .build import apply_treatment
from .errors import MlbridgeError
from .ligand import from_file
from .solvate import solvate
from .treatments import TREATMENTS

DEMO_LIGAND = Path(__file__).resolve().parent.parent / "systems" / "demo" / "ligand.sdf"


def available_treatments() -> list:
    """Every registered treatment whose term modules can be imported here."""
    import importlib
    out = []
    for t in TREATMENTS.values():
        try:
            for m in t.terms:
                importlib.import_module(f"mlbridge.terms.{m}")
        except ImportError:
            continue
        out.append(t.name)
    return out


def run_demo(out="demo-output", *, treatments=None, quick: bool = False, threads: int = 2) -> Path:
    """Build the demo ligand in water and compare every treatment from that one start structure.

    Writes ``<out>/comparison.md`` (+ json, PNGs) and ``<out>/check/`` (the NVE check report),
    and the built systems under ``<out>/systems/<treatment>``. Returns the check folder.
    """
    from .compare import compare
    t0 = time.time()
    out = Path(out)
    lig = from_file(DEMO_LIGAND, name="LIG")
    print(f"demo ligand {lig.smiles} ({lig.n_atoms} atoms) from {DEMO_LIGAND.name}")
    solv = solvate(lig, padding=1.0 if quick else 1.2,
                   density_equilibration_ps=0.2 if quick else 2.0)
    print(f"solvated: {solv.water_count()} waters, box {solv.box_vectors_nm()[0][0]:.2f} nm, "
          f"{solv.n_atoms} atoms ({time.time() - t0:.0f} s)")
    names = treatments or available_treatments()
    lengths = (dict(run_ps=0.05, equilibration_ps=0.05, nve_ps=0.2, report_interval=5,
                    sample_interval_steps=10, minimize_max_iterations=20) if quick else
               dict(run_ps=1.0, equilibration_ps=0.5, nve_ps=2.0, report_interval=10,
                    sample_interval_steps=20, minimize_max_iterations=100))
    compare(solv, treatments=names, out=out, threads=threads, progress=not quick, **lengths)
    for name in names:
        try:
            apply_treatment(solv, name).save(out / "systems" / name.replace("+", "_"))
        except MlbridgeError:
            pass
    import json
    summary = json.loads((out / "check" / "summary.json").read_text())
    for c in summary["checks"]:
        print(f"  {c['treatment']:12s} drift {c['fit']['slope_kT_per_ns_per_dof']:+.2e} kT/ns/DOF [{c['status']}]  "
              f"{c['speed']['ms_per_step']:7.2f} ms/step  {c['speed']['ns_per_day']:6.2f} ns/day")
    for w in summary["warnings"]:
        print(f"WARNING: {w}")
    print(f"comparison: {out / 'comparison.md'}\ncheck report: {out / 'check' / 'report.md'}")
    print(f"demo finished in {time.time() - t0:.0f} s")
    return out / "check"
