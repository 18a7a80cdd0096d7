"""Offline ANI weights: fetch once, load without network.

torchani's current wheels carry no weights and download them at first use, which fails offline.
The ``torchani==2.0`` wheel on PyPI still ships the ANI-1x and ANI-1ccx 8-member ensembles in
NeuroChem format under ``torchani/resources``. :func:`fetch` downloads that wheel with pip (PyPI is
the only network this needs) and unpacks the resources into a cache folder:

    python -m mlbridge.models fetch            # ANI-1x + ANI-1ccx, from PyPI
    python -m mlbridge.models fetch ani2x      # ANI-2x, through torchani's own (online) download
    python -m mlbridge.models status           # what is there

Cache folder: ``$MLBRIDGE_MODEL_DIR`` if set, else ``~/.cache/mlbridge/models``. Layout::

    <cache>/torchani-2.0/ani-1x_8x.info, ani-1x_8x/..., ani-1ccx_8x.info, ani-1ccx_8x/...
    <cache>/ani2x/ani2x_state_dict.pt   (or a NeuroChem ani-2x_8x.info tree)

The training logs in the wheel (``cost.dat``, ``output.opt``, ``tolerance.dat``; about 50 MB) are
not unpacked: nothing reads them. Unpacking is atomic (extract into a temporary folder inside the
cache, check, then rename), and a complete cache makes :func:`fetch` a no-op.

ANI-2x weights are used when they can be had, in this order: the ``weights_dir`` argument, the
folder named by ``$MLBRIDGE_ANI2X_DIR``, ``<cache>/ani2x``, torchani's own download cache
(``$TORCHANI_DATA_DIR`` or ``~/.local/share/Torchani``, ``StateDicts/ani2x_state_dict.pt``). A folder
may hold torchani's ``ani2x_state_dict.pt`` or a NeuroChem ``ani-2x_8x.info`` tree.

:func:`load_parameters` returns plain numpy arrays (:class:`AniParameters`) read with
``numpy.fromfile`` (fast: about 50 ms for an ensemble); :func:`stock_model` builds torchani's own
model from the same files with torchani's own loaders, as an independent reference.
"""
from __future__ import annotations

import argparse
import bz2
import os
import re
import shutil
import subprocess
import sys
import tempfile
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Optional

import numpy as np

from .errors import ModelUnavailableError, OptionError

#: environment variable overriding the cache folder
MODEL_DIR_ENV = "MLBRIDGE_MODEL_DIR"
#: environment variable naming a local folder with ANI-2x weights
ANI2X_DIR_ENV = "MLBRIDGE_ANI2X_DIR"
#: the PyPI wheel that carries the ANI-1x / ANI-1ccx NeuroChem files
WHEEL_SPEC = "torchani==2.0"
#: sub-folder of the cache that holds that wheel's resources
WHEEL_SUBDIR = "torchani-2.0"
FETCH_COMMAND = "python -m mlbridge.models fetch"
FETCH_ANI2X_COMMAND = "python -m mlbridge.models fetch ani2x"

#: model name -> NeuroChem info file name
INFO_FILES = {"ani1x": "ani-1x_8x.info", "ani1ccx": "ani-1ccx_8x.info", "ani2x": "ani-2x_8x.info"}
#: models that the torchani 2.0 wheel carries
WHEEL_MODELS = ("ani1x", "ani1ccx")
SUPPORTED_MODELS = ("ani1x", "ani1ccx", "ani2x")
ANI2X_STATE_DICT = "ani2x_state_dict.pt"
_TRAINING_LOGS = {"cost.dat", "output.opt", "tolerance.dat"}


@dataclass
class AniParameters:
    """Everything an ANI ensemble needs, as plain numbers (angstrom, hartree).

    Attributes
    ----------
    name : model name ("ani1x", "ani1ccx", "ani2x")
    symbols : element symbols in the model's species order
    radial_cutoff, angular_cutoff : AEV cutoffs, angstrom
    radial_eta, radial_shifts : radial AEV width (1/angstrom^2) and centres (angstrom)
    angular_eta, angular_zeta, angular_shifts, angular_sections : angular AEV parameters
    self_energies : symbol -> self (atomic reference) energy, hartree, float64
    members : one dict per ensemble member: symbol -> list of (weight (out, in), bias (out,))
    source : where the weights were read from
    """

    name: str
    symbols: tuple
    radial_cutoff: float
    radial_eta: float
    radial_shifts: tuple
    angular_cutoff: float
    angular_eta: float
    angular_zeta: float
    angular_shifts: tuple
    angular_sections: tuple
    self_energies: dict
    members: list = field(repr=False)
    source: str = ""


# --------------------------------------------------------------------------------------------
# locations
# --------------------------------------------------------------------------------------------
def model_dir(path: Optional[os.PathLike] = None) -> Path:
    """The cache folder: ``path`` if given, else ``$MLBRIDGE_MODEL_DIR``, else the default."""
    if path is not None:
        return Path(path).expanduser()
    env = os.environ.get(MODEL_DIR_ENV)
    if env:
        return Path(env).expanduser()
    return Path.home() / ".cache" / "mlbridge" / "models"


def _torchani_state_dicts_dir() -> Path:
    # torchani.paths.state_dicts_dir() creates the folder; this only looks.
    env = os.environ.get("TORCHANI_DATA_DIR")
    root = Path(env) if env else Path.home() / ".local" / "share" / "Torchani"
    return root / "StateDicts"


# --------------------------------------------------------------------------------------------
# completeness
# --------------------------------------------------------------------------------------------
_FILE_RE = re.compile(r"FILE:([^\[;\s]+)\[(\d+)\]")


def _read_info(info_file: Path) -> tuple[Path, Path, Path, int]:
    lines = [x.strip() for x in info_file.read_text().splitlines()]
    lines = [x for x in lines if x][:4]
    if len(lines) < 4:
        raise ValueError(f"{info_file}: expected 4 lines (const, sae, prefix, count)")
    const, sae, prefix, count = lines
    root = info_file.parent
    return root / const, root / sae, root / prefix, int(count)


def _const_symbols(const_file: Path) -> tuple:
    for line in const_file.read_text().splitlines():
        name, _, value = line.partition("=")
        if name.strip() == "Atyp":
            return tuple(s.strip() for s in value.strip().strip("[]").split(",") if s.strip())
    raise ValueError(f"{const_file}: no Atyp line")


def _decompress_nnf(path: Path) -> str:
    buf = path.read_bytes()
    start = buf.index(b"=") + 2  # "<length>=\n" header, then bz2 data
    return bz2.decompress(buf[start:])[:-1].decode("ascii")


def info_problems(info_file: Path) -> list:
    """What is missing or broken in the NeuroChem tree an info file names (empty = complete).

    Checks: the info file, the AEV-constants and self-energy files it names, and for every member
    ``<prefix><i>/networks/ANN-<element>.nnf`` for every element of the constants file, plus every
    weight/bias file each ``.nnf`` names, with exactly the byte count it declares.
    """
    info_file = Path(info_file)
    if not info_file.is_file() or info_file.stat().st_size == 0:
        return [f"{info_file} missing or empty"]
    problems = []
    try:
        const, sae, prefix, count = _read_info(info_file)
    except (ValueError, OSError) as exc:
        return [f"{info_file} unreadable: {exc}"]
    for f in (const, sae):
        if not f.is_file() or f.stat().st_size == 0:
            problems.append(f"{f} missing or empty")
    if problems:
        return problems
    try:
        symbols = _const_symbols(const)
    except (ValueError, OSError) as exc:
        return [str(exc)]
    for i in range(count):
        net_dir = prefix.parent / f"{prefix.name}{i}" / "networks"
        for s in symbols:
            nnf = net_dir / f"ANN-{s}.nnf"
            if not nnf.is_file() or nnf.stat().st_size == 0:
                problems.append(f"{nnf} missing or empty")
                continue
            try:
                named = _FILE_RE.findall(_decompress_nnf(nnf))
            except Exception as exc:  # corrupt bz2 stream and the like
                problems.append(f"{nnf} unreadable: {exc}")
                continue
            if not named:
                problems.append(f"{nnf} names no parameter files")
            for fname, numel in named:
                p = net_dir / fname
                if not p.is_file() or p.stat().st_size != 4 * int(numel):
                    problems.append(f"{p} missing or not {4 * int(numel)} bytes")
    return problems


def check_complete(root: Optional[os.PathLike] = None, models=WHEEL_MODELS) -> list:
    """Problems with the fetched ANI-1x/1ccx files under the cache (empty list = complete)."""
    base = model_dir(root) / WHEEL_SUBDIR
    problems = []
    for m in models:
        problems += info_problems(base / INFO_FILES[m])
    return problems


# --------------------------------------------------------------------------------------------
# fetching
# --------------------------------------------------------------------------------------------
def fetch(root: Optional[os.PathLike] = None, *, quiet: bool = False) -> Path:
    """Download ``torchani==2.0`` from PyPI with pip and unpack its ANI-1x/1ccx weights.

    Returns the folder holding the ``.info`` files. Does nothing when that folder is already
    complete (:func:`check_complete`). Raises ``RuntimeError`` when pip fails or the wheel lacks
    a file.
    """
    base = model_dir(root)
    target = base / WHEEL_SUBDIR
    if not check_complete(base):
        if not quiet:
            print(f"ANI-1x/ANI-1ccx weights already complete in {target}")
        return target
    base.mkdir(parents=True, exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix=".fetch-", dir=base))
    try:
        wheel_dir = work / "wheel"
        cmd = [sys.executable, "-m", "pip", "download", "--no-deps", "--no-cache-dir",
               WHEEL_SPEC, "-d", str(wheel_dir)]
        if not quiet:
            print("running:", " ".join(cmd))
        proc = subprocess.run(cmd, capture_output=True, text=True)
        wheels = sorted(wheel_dir.glob("torchani-2.0-*.whl")) if wheel_dir.is_dir() else []
        if proc.returncode != 0 or not wheels:
            raise RuntimeError(
                f"pip download of {WHEEL_SPEC} failed (exit {proc.returncode}); PyPI must be "
                f"reachable.\n{proc.stdout[-2000:]}\n{proc.stderr[-2000:]}")
        staged = work / "resources"
        prefix = "torchani/resources/"
        with zipfile.ZipFile(wheels[0]) as zf:
            for info in zf.infolist():
                name = info.filename
                if not name.startswith(prefix) or info.is_dir():
                    continue
                rel = name[len(prefix):]
                if not rel or Path(rel).name in _TRAINING_LOGS or ".." in Path(rel).parts:
                    continue
                out = staged / rel
                out.parent.mkdir(parents=True, exist_ok=True)
                with zf.open(info) as src, open(out, "wb") as dst:
                    shutil.copyfileobj(src, dst)
        problems = []
        for m in WHEEL_MODELS:
            problems += info_problems(staged / INFO_FILES[m])
        if problems:
            raise RuntimeError(f"{wheels[0].name} lacks files: " + "; ".join(problems[:5]))
        if target.exists():  # incomplete leftovers: move aside, removed with `work`
            os.rename(target, work / "stale")
        try:
            os.rename(staged, target)
        except OSError:
            # another process won the race; accept its result if complete
            if check_complete(base):
                raise
        if not quiet:
            print(f"ANI-1x/ANI-1ccx weights unpacked into {target}")
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return target


def fetch_ani2x(root: Optional[os.PathLike] = None, *, quiet: bool = False) -> Path:
    """Get ANI-2x through torchani's own download (needs the internet), copy it to the cache."""
    dest_dir = model_dir(root) / "ani2x"
    dest = dest_dir / ANI2X_STATE_DICT
    if dest.is_file() and dest.stat().st_size > 0:
        if not quiet:
            print(f"ANI-2x weights already in {dest}")
        return dest
    cached = _torchani_state_dicts_dir() / ANI2X_STATE_DICT
    if not (cached.is_file() and cached.stat().st_size > 0):
        from torchani.arch import _fetch_state_dict  # torchani's own downloader

        try:
            _fetch_state_dict(ANI2X_STATE_DICT, private=False)
        except Exception as exc:
            raise ModelUnavailableError(
                f"torchani could not download ANI-2x ({type(exc).__name__}: {exc}); it needs "
                f"the internet (huggingface.co or github.com). Alternatively set "
                f"{ANI2X_DIR_ENV} to a folder holding {ANI2X_STATE_DICT} or a NeuroChem "
                f"{INFO_FILES['ani2x']} tree.") from exc
    dest_dir.mkdir(parents=True, exist_ok=True)
    tmp = dest.with_suffix(".part")
    shutil.copyfile(cached, tmp)
    os.replace(tmp, dest)
    if not quiet:
        print(f"ANI-2x weights copied to {dest}")
    return dest


# --------------------------------------------------------------------------------------------
# locating + loading
# --------------------------------------------------------------------------------------------
def _unavailable(name: str, where: str, detail: str = "") -> ModelUnavailableError:
    if name in WHEEL_MODELS:
        how = (f"Fetch them (pip downloads {WHEEL_SPEC} from PyPI, about 22 MB) with:\n"
               f"    {FETCH_COMMAND}\n"
               f"or set {MODEL_DIR_ENV} to the folder where that command put them.")
    else:
        how = (f"Get them with (needs the internet):\n    {FETCH_ANI2X_COMMAND}\n"
               f"or set {ANI2X_DIR_ENV} (or pass weights_dir=) to a folder holding "
               f"{ANI2X_STATE_DICT} or a NeuroChem {INFO_FILES['ani2x']} tree; offline, use "
               f"ani1x/ani1ccx (H, C, N, O) or the semi-empirical treatment 'xtb'.")
    extra = f" ({detail})" if detail else ""
    return ModelUnavailableError(f"ANI model '{name}': weights not found in {where}{extra}. {how}")


def locate(name: str, weights_dir: Optional[os.PathLike] = None) -> Path:
    """Path of the weights of ``name``: a NeuroChem ``.info`` file or an ANI-2x state dict.

    Raises ModelUnavailableError (with the fetch command) when they are missing or incomplete.
    """
    if name not in SUPPORTED_MODELS:
        raise OptionError(f"unknown ANI model {name!r}; choose one of {SUPPORTED_MODELS}")
    info_name = INFO_FILES[name]
    if name in WHEEL_MODELS:
        if weights_dir is not None:
            wd = Path(weights_dir).expanduser()
            candidates = [wd / info_name, wd / WHEEL_SUBDIR / info_name]
        else:
            candidates = [model_dir() / WHEEL_SUBDIR / info_name]
        problems = []
        for c in candidates:
            p = info_problems(c)
            if not p:
                return c
            problems += p
        where = weights_dir if weights_dir is not None else model_dir()
        n = len(problems)
        detail = problems[0] + (f"; {n - 1} more" if n > 1 else "")
        return _raise(_unavailable(name, str(where), detail))
    # ani2x
    folders = []
    if weights_dir is not None:
        folders.append(Path(weights_dir).expanduser())
    elif os.environ.get(ANI2X_DIR_ENV):
        folders.append(Path(os.environ[ANI2X_DIR_ENV]).expanduser())
    folders += [model_dir() / "ani2x", _torchani_state_dicts_dir()]
    for f in folders:
        sd = f / ANI2X_STATE_DICT
        if sd.is_file() and sd.stat().st_size > 0:
            return sd
        if not info_problems(f / info_name):
            return f / info_name
    return _raise(_unavailable(name, ", ".join(str(f) for f in folders)))


def _raise(exc):
    raise exc


def _read_floats(path: Path, shape) -> np.ndarray:
    a = np.fromfile(path, dtype="<f4")
    if a.size != int(np.prod(shape)):
        raise ModelUnavailableError(f"{path}: {a.size} floats, expected {shape}; rerun "
                                    f"{FETCH_COMMAND}")
    return a.reshape(shape)


def _load_neurochem(name: str, info_file: Path) -> AniParameters:
    const, sae, prefix, count = _read_info(info_file)
    floats, seqs = {}, {}
    for line in const.read_text().splitlines():
        key, _, value = (x.strip() for x in line.partition("="))
        if key in ("Rcr", "Rca"):
            floats[key] = float(value)
        elif key in ("EtaR", "ShfR", "Zeta", "ShfZ", "EtaA", "ShfA"):
            seqs[key] = tuple(float(v) for v in value.strip("[]").split(","))
    symbols = _const_symbols(const)
    self_e = {}
    for line in sae.read_text().splitlines():
        if "=" in line:
            lhs, rhs = line.split("=")
            self_e[lhs.split(",")[0].strip()] = float(rhs)
    members = []
    for i in range(count):
        net_dir = prefix.parent / f"{prefix.name}{i}" / "networks"
        member = {}
        for s in symbols:
            text = _decompress_nnf(net_dir / f"ANN-{s}.nnf")
            layers = []
            for block in text.split("layer")[1:]:
                nodes = int(re.search(r"nodes=(\d+)", block).group(1))
                inp = int(re.search(r"blocksize=(\d+)", block).group(1))
                act = int(re.search(r"activation=(\d+)", block).group(1))
                (wf, _), (bf, _) = _FILE_RE.findall(block)
                layers.append((act, _read_floats(net_dir / wf, (nodes, inp)),
                               _read_floats(net_dir / bf, (nodes,))))
            if layers[-1][0] != 6 or any(a != 9 for a, _, _ in layers[:-1]):
                raise ModelUnavailableError(f"{net_dir}/ANN-{s}.nnf: unsupported activations "
                                            "(expected CELU hidden layers, linear output)")
            member[s] = [(w, b) for _, w, b in layers]
        members.append(member)
    return AniParameters(
        name=name, symbols=symbols, radial_cutoff=floats["Rcr"], radial_eta=seqs["EtaR"][0],
        radial_shifts=seqs["ShfR"], angular_cutoff=floats["Rca"], angular_eta=seqs["EtaA"][0],
        angular_zeta=seqs["Zeta"][0], angular_shifts=seqs["ShfA"], angular_sections=seqs["ShfZ"],
        self_energies=self_e, members=members, source=str(info_file))


def _ani2x_architecture():
    """torchani's ANI-2x architecture with untrained weights (no download)."""
    from torchani.arch import Assembler
    from torchani.utils import SYMBOLS_2X

    asm = Assembler(periodic_table_index=True)
    asm.set_symbols(SYMBOLS_2X)
    asm.set_global_cutoff_fn("cosine")
    asm.set_aev_computer(radial="ani2x", angular="ani2x", strategy="pyaev")
    asm.set_atomic_networks(ctor="ani2x")
    asm.set_neighborlist("all_pairs")
    asm.set_gsaes_as_self_energies("wb97x-631gd")
    return asm.assemble(8)


def parameters_from_torchani(model, name: str, source: str = "") -> AniParameters:
    """Extract :class:`AniParameters` from a torchani ``ANI`` ensemble model (cosine cutoff,
    ANI radial/angular terms, CELU(0.1) networks)."""
    import torch

    nnp = model.potentials["nnp"]
    aev = nnp.aev_computer
    symbols = tuple(model.symbols)
    f = lambda t: tuple(float(v) for v in t.detach().double().reshape(-1))  # noqa: E731
    sae = model.energy_shifter.self_energies.detach().double().tolist()
    members = []
    for mem in nnp.neural_networks.members:
        member = {}
        for s in symbols:
            net = mem.atomics[s]
            lins = list(net.layers) + [net.final_layer]
            member[s] = [(lin.weight.detach().to(torch.float32).numpy().copy(),
                          lin.bias.detach().to(torch.float32).numpy().copy()) for lin in lins]
        members.append(member)
    return AniParameters(
        name=name, symbols=symbols, radial_cutoff=float(aev.radial.cutoff),
        radial_eta=f(aev.radial.eta)[0], radial_shifts=f(aev.radial.shifts),
        angular_cutoff=float(aev.angular.cutoff), angular_eta=f(aev.angular.eta)[0],
        angular_zeta=f(aev.angular.zeta)[0], angular_shifts=f(aev.angular.shifts),
        angular_sections=f(aev.angular.sections), self_energies=dict(zip(symbols, sae)),
        members=members, source=source)


def _load_state_dict_model(path: Path):
    import torch

    model = _ani2x_architecture()
    sd = torch.load(path, map_location="cpu", weights_only=True)
    model.load_state_dict(sd)
    model.requires_grad_(False)
    return model


def load_parameters(name: str = "ani1x", *, weights_dir: Optional[os.PathLike] = None
                    ) -> AniParameters:
    """Read the weights of ``name`` ("ani1x", "ani1ccx", "ani2x") from disk; no network.

    Raises ModelUnavailableError naming the fetch command when they are missing.
    """
    return load_path(name, locate(name, weights_dir))


def load_path(name: str, path: os.PathLike) -> AniParameters:
    """Read :class:`AniParameters` from a path :func:`locate` returned (``.info`` or ``.pt``)."""
    path = Path(path)
    if path.suffix == ".info":
        return _load_neurochem(name, path)
    return parameters_from_torchani(_load_state_dict_model(path), name, str(path))


def stock_model(name: str = "ani1x", *, weights_dir: Optional[os.PathLike] = None,
                dtype=None):
    """torchani's own ensemble model (``torchani.arch.ANI``) built from the same files with
    torchani's own loaders; takes (atomic numbers, angstrom), returns hartree."""
    import torch

    path = locate(name, weights_dir)
    if path.suffix == ".info":
        from torchani import neurochem
        from torchani.arch import ANI

        const, sae, prefix, count = _read_info(path)
        aev, symbols = neurochem.load_aev_computer_and_symbols(const)
        model = ANI(symbols, aev, neurochem.load_ensemble(symbols, prefix, count),
                    neurochem.load_sae(sae), periodic_table_index=True)
        model.requires_grad_(False)
    else:
        model = _load_state_dict_model(path)
    return model.to(dtype=dtype or torch.float32)


# --------------------------------------------------------------------------------------------
# command line
# --------------------------------------------------------------------------------------------
def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="python -m mlbridge.models",
                                 description="Fetch and inspect offline ANI weights.")
    sub = ap.add_subparsers(dest="cmd", required=True)
    pf = sub.add_parser("fetch", help="download weights into the cache")
    pf.add_argument("which", nargs="?", default="ani1x", choices=["ani1x", "ani1ccx", "ani2x", "all"],
                    help="ani1x/ani1ccx (one wheel holds both; default) or ani2x (online) or all")
    pf.add_argument("--dir", default=None, help=f"cache folder (default ${MODEL_DIR_ENV} or "
                    "~/.cache/mlbridge/models)")
    ps = sub.add_parser("status", help="say which models are usable offline")
    ps.add_argument("--dir", default=None)
    args = ap.parse_args(argv)
    if args.dir:
        os.environ[MODEL_DIR_ENV] = args.dir
    if args.cmd == "fetch":
        try:
            if args.which in ("ani1x", "ani1ccx", "all"):
                fetch()
            if args.which in ("ani2x", "all"):
                fetch_ani2x()
        except (RuntimeError, ModelUnavailableError) as exc:
            print(f"error: {exc}", file=sys.stderr)
            return 1
        return 0
    for m in SUPPORTED_MODELS:
        try:
            print(f"{m}: {locate(m)}")
        except ModelUnavailableError as exc:
            print(f"{m}: unavailable. " + " ".join(str(exc).split()))
    return 0


if __name__ == "__main__":
    sys.exit(main())
