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
    """Build the demo ligand in water and check each treatment; returns the report folder."""
    from .drift import check_setup
    from .report import write_check_report
    from .cli import _print_checks
    t0 = time.time()
    out = Path(out)
    lig = from_file(DEMO_LIGAND, name="LIG")
    print(f"demo ligand {lig.smiles} ({lig.n_atoms} atoms) from {DEMO_LIGAND.name}")
    solv = solvate(lig, padding=1.0 if quick else 1.2,
                   density_equilibration_ps=0.2 if quick else 2.0)
    print(f"solvated: {solv.water_count()} waters, box {solv.box_vectors_nm()[0][0]:.2f} nm, "
          f"{solv.n_atoms} atoms ({time.time() - t0:.0f} s)")
    names = treatments or available_treatments()
    lengths = dict(equilibration_ps=0.1, nve_ps=0.2) if quick else dict(equilibration_ps=2.0, nve_ps=5.0)
    results = []
    for name in names:
        try:
            built = apply_treatment(solv, name)
        except MlbridgeError as e:
            print(f"  {name}: skipped: {e}")
            continue
        built.save(out / "systems" / name.replace("+", "_"))
        results.append(check_setup(built, threads=threads, progress=not quick, **lengths))
        print(f"  {name}: done ({time.time() - t0:.0f} s)")
    write_check_report(results, out / "check", title="mlbridge demo: NVE drift and speed per treatment")
    _print_checks(results, out / "check")
    print(f"demo finished in {time.time() - t0:.0f} s")
    return out / "check"
