"""ANI ensemble, energy + forces per call: torchani's stock model vs mlbridge's term.

Acetaminophen (20 atoms, RDKit ETKDG seed 42 + MMFF). For each thread count (1, 2) and precision
(float32, float64) the two are timed side by side in one process, alternating one stock call and
one of ours, median of N calls after a warm-up; the stock call is torchani's ensemble model
forward + ``torch.autograd.grad`` for the forces, converted to kJ/mol and kJ/mol/nm the same way.
A last line times ours on moving coordinates (a random walk of 0.0015 nm per call and atom
component, faster than a ligand's net motion in MD), so neighbour-list rebuilds are included.

    .venv/bin/python benchmarks/bench_ani_ensemble.py [--calls 200] [--model ani1x]

Needs the cached weights (``python -m mlbridge.models fetch``). Timings on a shared machine are
noisy: read the ratio, which is measured on interleaved calls.
"""
from __future__ import annotations

import argparse
import os
import time

os.environ.setdefault("TORCHANI_NO_WARN_EXTENSIONS", "1")

import numpy as np  # noqa: E402
import torch  # noqa: E402
from rdkit import Chem  # noqa: E402
from rdkit.Chem import AllChem  # noqa: E402

from mlbridge.terms import ani  # noqa: E402
from mlbridge.terms.base import RegionInfo  # noqa: E402

SMILES = "CC(=O)Nc1ccc(O)cc1"


def ligand():
    mol = Chem.AddHs(Chem.MolFromSmiles(SMILES))
    AllChem.EmbedMolecule(mol, randomSeed=42)
    AllChem.MMFFOptimizeMolecule(mol)
    region = RegionInfo(symbols=tuple(a.GetSymbol() for a in mol.GetAtoms()),
                        atomic_numbers=tuple(a.GetAtomicNum() for a in mol.GetAtoms()),
                        net_charge=0)
    return region, mol.GetConformer().GetPositions() * 0.1  # nm


def side_by_side(f_stock, f_ours, calls, warmup=20):
    for _ in range(warmup):
        f_stock()
        f_ours()
    ts, to = [], []
    for _ in range(calls):
        t0 = time.perf_counter()
        f_stock()
        t1 = time.perf_counter()
        f_ours()
        t2 = time.perf_counter()
        ts.append(t1 - t0)
        to.append(t2 - t1)
    return 1e3 * float(np.median(ts)), 1e3 * float(np.median(to))


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--calls", type=int, default=200)
    ap.add_argument("--model", default="ani1x", choices=["ani1x", "ani1ccx", "ani2x"])
    ap.add_argument("--threads", default="1,2")
    ap.add_argument("--precisions", default="float32,float64")
    args = ap.parse_args()
    region, x = ligand()
    print(f"{args.model}, {region.n_atoms}-atom acetaminophen, energy + forces, median of "
          f"{args.calls} interleaved calls after 20 warm-up calls; torch {torch.__version__}")
    print(f"{'threads':>7} {'precision':>9} {'stock ms':>9} {'ours ms':>8} {'speed-up':>8} "
          f"{'|dE|/|E|':>9} {'max|dE| kJ/mol':>14} {'max|dF| kJ/mol/nm':>17} {'/max|F|':>8}")
    for threads in (int(t) for t in args.threads.split(",")):
        torch.set_num_threads(threads)
        for precision in args.precisions.split(","):
            stock = ani.stock_ensemble(args.model, precision)
            term = ani.make_term(region, model=args.model, precision=precision)
            e_ref, f_ref, _ = ani.stock_energy_forces(stock, region.atomic_numbers, x)
            res = term.energy_forces(x)
            de = abs(res.energy - e_ref)
            df = float(np.abs(res.region_forces - f_ref).max())
            fmax = float(np.abs(f_ref).max())
            ms_stock, ms_ours = side_by_side(
                lambda: ani.stock_energy_forces(stock, region.atomic_numbers, x),
                lambda: term.energy_forces(x), args.calls)
            print(f"{threads:>7} {precision:>9} {ms_stock:>9.2f} {ms_ours:>8.2f} "
                  f"{ms_stock / ms_ours:>7.2f}x {de / abs(e_ref):>9.1e} {de:>14.2e} {df:>17.2e} "
                  f"{df / fmax:>8.1e}")
    # ours on moving coordinates (neighbour-list rebuilds included)
    torch.set_num_threads(1)
    term = ani.make_term(region, model=args.model)
    rng = np.random.default_rng(0)
    xs = [x]
    for _ in range(args.calls + 20):
        xs.append(xs[-1] + rng.normal(scale=0.0015, size=x.shape))
    for y in xs[:20]:
        term.energy_forces(y)
    n0 = term.n_rebuilds
    ts = []
    for y in xs[20:]:
        t0 = time.perf_counter()
        term.energy_forces(y)
        ts.append(time.perf_counter() - t0)
    print(f"ours, 1 thread, {ani.DEFAULT_PRECISION}, moving coordinates: "
          f"{1e3 * float(np.median(ts)):.2f} ms median, {1e3 * float(np.mean(ts)):.2f} ms mean, "
          f"{term.n_rebuilds - n0} neighbour-list rebuilds in {args.calls} calls "
          f"(skin {ani.DEFAULT_SKIN_NM} nm)")


if __name__ == "__main__":
    main()
