"""The ``mlbridge`` command line: a thin layer over the Python API.

Verbs: ``build`` (a system folder), ``check`` (NVE drift + speed report), ``compare`` (all
treatments side by side), ``demo`` (the built-in ligand end to end), ``treatments`` (list them).
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

from .errors import MlbridgeError



EXAMPLES = {
    "build": "mlbridge build 'CC(=O)Nc1ccc(O)cc1' --treatment ml --out built/lig-ml\n"
             "  mlbridge build ligand.pdb --smiles 'CC(=O)Nc1ccc(O)cc1' --box octahedron --salt 0.15 --out built/x\n"
             "  mlbridge build complex.prmtop --coordinates complex.inpcrd --region-residue LIG --treatment ml --out built/y",
    "check": "mlbridge check built/lig-ml --dt 1.0 --nve-ps 10 --threads 2 --out reports/lig-ml",
    "compare": "mlbridge compare ligand.sdf --treatments classical ml ml+d3 --out reports/compare",
    "demo": "mlbridge demo --out demo-output",
    "treatments": "mlbridge treatments",
}


def _add_build_args(p):
    p.add_argument("ligand", help="SMILES, SDF/MOL/MOL2 file, PDB file (with --smiles), or a prepared "
                                  "system (.prmtop/.top/.psf/.xml with --coordinates)")
    p.add_argument("--smiles", help="SMILES template for a PDB ligand's bond orders")
    p.add_argument("--name", help="ligand residue name (1-3 characters, default LIG)")
    p.add_argument("--model", default="ani1x", help="ML potential for ml* treatments (ani1x, ani1ccx, ani2x)")
    p.add_argument("--padding", type=float, default=1.2, help="nm from ligand to box face (default 1.2)")
    p.add_argument("--box", choices=("cube", "octahedron"), default="cube", help="box shape")
    p.add_argument("--salt", type=float, default=0.0, help="NaCl molarity on top of neutralising ions (M)")
    p.add_argument("--cutoff", type=float, default=0.9, help="PME real-space cutoff, nm (0.9-1.0)")
    p.add_argument("--coordinates", help="coordinates of a prepared system (.inpcrd/.rst7, .gro, .crd/.pdb)")
    p.add_argument("--params", nargs="*", default=(), help="CHARMM parameter files of a prepared .psf")
    p.add_argument("--region-residue", help="residue name of the region in a prepared system")
    p.add_argument("--region-atoms", help="atom indices of the region in a prepared system, e.g. 0-19,25")


def _add_check_args(p):
    p.add_argument("--dt", type=float, default=1.0, help="timestep, fs (default 1.0)")
    p.add_argument("--equil-ps", type=float, default=2.0, help="NVT equilibration, ps (default 2)")
    p.add_argument("--nve-ps", type=float, default=5.0, help="NVE length, ps (default 5)")
    p.add_argument("--threads", type=int, default=2, help="CPU threads for OpenMM and torch (default 2)")
    p.add_argument("--report-every", type=int, default=10, help="steps between energy samples (default 10)")
    p.add_argument("--threshold", type=float, default=None, help="drift threshold, kT/ns per DOF (default 0.01)")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")


def parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(prog="mlbridge", description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    sub = ap.add_subparsers(dest="verb", required=True)
    fmt = argparse.RawDescriptionHelpFormatter
    p = sub.add_parser("build", help="build a ligand-in-water system with one treatment",
                       epilog="example:\n  " + EXAMPLES["build"], formatter_class=fmt)
    _add_build_args(p)
    p.add_argument("--treatment", default="classical", help="classical, ml, ml+d3, ml+d3+qeq, xtb")
    p.add_argument("--out", required=True, help="output folder (system.xml, start.pdb, metadata.json)")
    p = sub.add_parser("check", help="NVE drift and speed check of a built system folder",
                       epilog="example:\n  " + EXAMPLES["check"], formatter_class=fmt)
    p.add_argument("folder", help="folder written by `mlbridge build`")
    _add_check_args(p)
    p.add_argument("--out", required=True, help="report folder (summary.json, report.md, PNGs)")
    p = sub.add_parser("compare", help="run treatments side by side from one start structure",
                       epilog="example:\n  " + EXAMPLES["compare"], formatter_class=fmt)
    _add_build_args(p)
    _add_check_args(p)
    p.add_argument("--treatments", nargs="+", default=None, help="default: all registered")
    p.add_argument("--reference", default="classical", help="treatment the forces are compared against")
    p.add_argument("--run-ps", type=float, default=2.0, help="NVT sampling per treatment, ps")
    p.add_argument("--out", required=True, help="comparison folder")
    p = sub.add_parser("demo", help="the built-in ligand through build + check (+ compare)",
                       epilog="example:\n  " + EXAMPLES["demo"], formatter_class=fmt)
    p.add_argument("--out", default="demo-output", help="output folder (default demo-output)")
    p.add_argument("--treatments", nargs="+", default=None, help="default: every available treatment")
    p.add_argument("--quick", action="store_true", help="very short runs (used by the tests)")
    p.add_argument("--threads", type=int, default=2)
    sub.add_parser("treatments", help="list the registered treatments",
                   epilog="example:\n  " + EXAMPLES["treatments"], formatter_class=fmt)
    return ap


def _solvated_from_args(a):
    from .prepared import PREPARED_SUFFIXES, load_prepared
    from .ligand import load_ligand
    from .solvate import solvate
    if Path(a.ligand).suffix.lower() in PREPARED_SUFFIXES:
        return load_prepared(a.ligand, coordinates=a.coordinates, params=a.params,
                             region_residue=a.region_residue, region_atoms=a.region_atoms)
    lig = load_ligand(a.ligand, smiles=a.smiles, name=a.name)
    return solvate(lig, padding=a.padding, box_shape=a.box, salt_molar=a.salt, cutoff=a.cutoff)


def _check_kwargs(a) -> dict:
    from .drift import DRIFT_THRESHOLD_KT_PER_NS_PER_DOF
    return dict(dt_fs=a.dt, equilibration_ps=a.equil_ps, nve_ps=a.nve_ps, threads=a.threads,
                report_interval=a.report_every, progress=not a.no_progress,
                threshold_kT_per_ns_per_dof=a.threshold if a.threshold is not None else DRIFT_THRESHOLD_KT_PER_NS_PER_DOF)


def main(argv=None) -> int:
    a = parser().parse_args(argv)
    try:
        return _dispatch(a)
    except MlbridgeError as e:
        print(f"mlbridge {a.verb}: error: {e}", file=sys.stderr)
        return 2


def _dispatch(a) -> int:
    if a.verb == "treatments":
        from .treatments import TREATMENTS
        for t in TREATMENTS.values():
            print(f"{t.name:12s} {t.summary}")
        return 0
    if a.verb == "build":
        from .build import apply_treatment
        built = apply_treatment(_solvated_from_args(a), a.treatment, model=a.model)
        built.save(a.out)
        print(f"built {a.treatment} system ({built.system.getNumParticles()} atoms, region "
              f"{len(built.region)} atoms) in {a.out}")
        return 0
    if a.verb == "check":
        from .build import BuiltSystem
        from .drift import check_setup
        from .report import write_check_report
        built = BuiltSystem.load(a.folder)
        res = check_setup(built, **_check_kwargs(a))
        write_check_report([res], a.out)
        _print_checks([res], a.out)
        return 0
    if a.verb == "compare":
        from .compare import compare
        solv = _solvated_from_args(a)
        out = compare(solv, treatments=a.treatments, reference=a.reference, model=a.model,
                      run_ps=a.run_ps, out=a.out, **_check_kwargs(a))
        print(f"comparison written to {out}/comparison.md")
        return 0
    if a.verb == "demo":
        from .demo import run_demo
        run_demo(a.out, treatments=a.treatments, quick=a.quick, threads=a.threads)
        return 0
    raise AssertionError(a.verb)  # argparse guarantees a known verb


def _print_checks(results, out) -> None:
    for r in results:
        flag = {"pass": "ok", "drifts": "DRIFTS", "unresolved": "unresolved: run longer"}[r.status]
        print(f"  {r.treatment:12s} drift {r.fit.slope_kT_per_ns_per_dof:+.2e} kT/ns/DOF [{flag}]  "
              f"{r.speed.ms_per_step:7.2f} ms/step  {r.speed.ns_per_day:6.2f} ns/day")
    for r in results:
        for w in r.warnings:
            print(f"WARNING: {w}")
    print(f"report: {Path(out) / 'report.md'}")


if __name__ == "__main__":
    sys.exit(main())
