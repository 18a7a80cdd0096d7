"""Shared fixtures. The parameter cache lives in one folder per test session, so AM1-BCC (sqm)
runs once per molecule per session; the ANI weights come from the cache `make` fills."""
import os
from pathlib import Path

import pytest

os.environ.setdefault("OMP_NUM_THREADS", "2")
os.environ.setdefault("TORCHANI_NO_WARN_EXTENSIONS", "1")

ROOT = Path(__file__).resolve().parent.parent
SYSTEMS = ROOT / "systems"
DEMO_SMILES = "CC(=O)Nc1ccc(O)cc1"


@pytest.fixture(scope="session", autouse=True)
def _session_cache(tmp_path_factory):
    cache = tmp_path_factory.mktemp("mlbridge-cache")
    old = os.environ.get("MLBRIDGE_CACHE_DIR")
    os.environ["MLBRIDGE_CACHE_DIR"] = str(cache)
    yield cache
    if old is None:
        os.environ.pop("MLBRIDGE_CACHE_DIR", None)
    else:
        os.environ["MLBRIDGE_CACHE_DIR"] = old


@pytest.fixture(scope="session")
def demo_ligand():
    from mlbridge.ligand import from_file
    return from_file(SYSTEMS / "demo" / "ligand.sdf", name="LIG")


@pytest.fixture(scope="session")
def demo_params(demo_ligand):
    from mlbridge.parameters import parametrize
    return parametrize(demo_ligand)


@pytest.fixture(scope="session")
def solvated(demo_ligand, demo_params):
    """The demo ligand in a small cubic box (padding 1.0 nm), density-equilibrated."""
    from mlbridge.solvate import solvate
    return solvate(demo_ligand, padding=1.0, params=demo_params)


def cpu_or_reference_context(system, platform="Reference"):
    """A Context on OpenMM's Reference platform (double precision) or its CPU platform (2 threads)."""
    import openmm
    props = {"Threads": "2"} if platform == "CPU" else {}
    return openmm.Context(system, openmm.VerletIntegrator(0.001), openmm.Platform.getPlatformByName(platform), props)


def context_energy_forces(ctx, pos, groups=None):
    """Potential energy (kJ/mol) and forces (kJ/mol/nm, ndarray) of ``ctx`` at ``pos`` (nm)."""
    import numpy as np
    import openmm.unit as unit
    ctx.setPositions(pos * unit.nanometer)
    kw = {} if groups is None else {"groups": set(groups)}
    st = ctx.getState(getEnergy=True, getForces=True, **kw)
    return (st.getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole),
            np.array(st.getForces(asNumpy=True).value_in_unit(unit.kilojoule_per_mole / unit.nanometer)))
