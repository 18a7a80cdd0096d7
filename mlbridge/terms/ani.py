r"""ANI ensemble potential of the region, in vacuum, built for speed on a CPU.

The energy
----------
ANI writes the energy of a molecule as a sum of atomic contributions, each a neural network of the
atom's element Z_i applied to its atomic environment vector (AEV) G_i:

    E = sum_i [ NN_{Z_i}(G_i) + E0_{Z_i} ]

with E0_Z the element's self (reference) energy. The AEV (Smith, Isayev, Roitberg, Chem. Sci. 8,
3192 (2017), from memory) has a radial part, per neighbour element s and shift R_k,

    G^R_{i,s,k} = sum_{j in s} 0.25 exp(-eta_R (r_ij - R_k)^2) f_c(r_ij; R_c^R)

and an angular part, per unordered neighbour element pair (s, s'), radial shift R_k and angular
section theta_l,

    G^A_{i,ss',k,l} = sum_{j<k' in (s,s')} 2 [(1 + cos(theta_ijk' - theta_l)) / 2]^zeta
                      exp(-eta_A ((r_ij + r_ik')/2 - R_k)^2) f_c(r_ij) f_c(r_ik')

with f_c(r; R_c) = 0.5 cos(pi r / R_c) + 0.5 inside the cutoff, 0 outside, and, as in NeuroChem and
torchani, theta = acos(0.95 cos theta_true). An ensemble averages 8 independently trained networks:
E = mean_m E_m; the members' spread is a free uncertainty estimate.

Models (citations from memory):
- ``ani1x``: Smith et al., J. Chem. Phys. 148, 241733 (2018); wB97X/6-31G(d); H, C, N, O.
- ``ani1ccx``: Smith et al., Nat. Commun. 10, 2903 (2019); CCSD(T)*/CBS (includes dispersion);
  H, C, N, O.
- ``ani2x``: Devereux et al., J. Chem. Theory Comput. 16, 4192 (2020); wB97X/6-31G(d);
  H, C, N, O, F, S, Cl.
All are trained on neutral molecules; the term refuses other charges and elements.

How it is fast (and still exactly the same function as torchani's)
------------------------------------------------------------------
Measured against torchani's stock ensemble (energy + forces by autograd), see
``benchmarks/bench_ani_ensemble.py``:

- **Members batched.** Per element, the first layers of the 8 members sit side by side in one
  (F, 8 h1) matrix, so the element's AEVs meet all members in one matmul; the deeper layers are
  one batched matmul over the members (narrower members zero-padded; padding units contribute
  exactly zero). That is 4 matmuls per element instead of 32 networks one after the other. On
  this AMD/MKL machine the matmuls are compute-bound for these few-row inputs, so atoms are not
  padded across elements (a 32-network padded ``baddbmm`` measured slower here).
- **Hand-written backward, no autograd.** The networks' backward uses
  CELU'(z) = 1 + 10 min(celu(z), 0) (alpha = 0.1) and the transposed weights; the AEV's
  derivatives (radial, cosine, mean-distance and cutoff factors) are written out and scattered
  to the atoms with one ``index_add_``. No graph is built or kept between steps.
- **Neighbour list with a skin.** Pairs within R_c^R + skin and angular triples within
  R_c^A + skin are listed once (numpy) and re-used until an atom has moved, relative to the mean
  displacement (so translating the molecule costs nothing), by more than skin/2 since the list
  was built. Listed pairs outside the true cutoff get f_c = 0 exactly, so results do not depend on
  the skin.
- **Dead AEV columns dropped.** AEV blocks of elements absent from the region, and angular blocks
  of element pairs that have no triple in the current list, are identically zero until the next
  rebuild; they and their first-layer weight rows are left out (this matters most for ANI-2x,
  whose 1008-wide AEV shrinks to 384 columns for an H/C/N/O ligand).
- **Built once**: species and element blocks per term; scatter indices per list rebuild; packed
  weights per (parameters, element, precision), shared between terms.

Precision: ``precision="float32"`` (default) or ``"float64"``, chosen by measured drift and speed
(benchmarks/drift_ani_precision.py, results in benchmarks/results/):

- speed: float64 costs 1.6-1.8x as much per call (demo ligand, 1 thread: 8.7-9.6 vs 14.1-15.7 ms;
  the networks' matmuls, most of the cost, run at about half the rate);
- drift, ligand alone in vacuum (all 48 degrees of freedom feel only ANI, 10 ps NVE, two seeds):
  at 0.5 fs float32 +0.002 / -0.072, float64 -0.018 / +0.058 kT/ns/DOF; at 1 fs float32
  +0.13 / +0.13, float64 -0.09 / -0.06. The scatter between seeds is as large as any difference
  between the precisions (at 1 fs float32 came out above float64 twice: possibly a small heating,
  not resolved by two runs);
- in water the ligand holds 48 of ~7,000 degrees of freedom, so even 0.2 kT/ns per ligand degree
  of freedom is 0.0014 kT/ns per degree of freedom of the system, a seventh of the warning
  threshold. In-water runs (``--medium water``: `ml`, 0.5 fs, 0.5 ps NVT + 2 ps NVE, three
  seeds, +- 2 sigma ~0.01): float32 -0.000, -0.003, +0.011; float64 -0.010, -0.008, -0.010
  kT/ns/DOF (classical alone at 0.5 fs, earlier runs: -0.008, -0.012). Both within the 0.01
  threshold on average; the float32 runs sit ~0.012 higher, more than the vacuum bound on the
  ligand's own share allows, so this is read as scatter of 2 ps runs, not yet as a precision
  effect (more seeds would settle it).

So float32 (what torchani itself runs; 1.3-1.4x faster per MD step in water). Its numbers are close to float64: energy 6e-5 kJ/mol
apart (the self energies, -515 hartree of the total, are summed in float64 in both modes; the
networks' part is float32), forces 1.6e-5 of max |F|. Use float64 for a ligand alone in vacuum
or when a long NVE run must conserve energy in the ligand's own degrees of freedom.

``extras`` of each result:
- ``member_energies_kjmol``: list of the 8 members' total energies, kJ/mol;
- ``ensemble_std_kjmol``: their standard deviation (sample std, ddof = 1, as torchani's
  ``energies_qbcs``);
- ``ensemble_std_per_atom_kjmol``: that divided by sqrt(n_atoms) -- torchani's QBC factor rho
  (Smith et al. 2018), the number its active learning thresholds.
- ``neighbour_list_rebuilt``: whether this call rebuilt the list.
"""
from __future__ import annotations

import functools
import math
import os
from typing import Optional

import numpy as np
import torch

from .. import units
from ..errors import DomainError, OptionError
from .base import RegionInfo, RegionTerm, TermContent, TermResult

__all__ = ["make_term", "AniTerm", "stock_ensemble", "stock_energy_forces", "MODEL_CONTENT",
           "DEFAULT_PRECISION", "DEFAULT_SKIN_NM"]

DEFAULT_PRECISION = "float32"
#: neighbour-list skin, nm (rebuild when an atom moved > skin/2 relative to the mean motion)
DEFAULT_SKIN_NM = 0.05

_HCNO = frozenset({"H", "C", "N", "O"})
_ANI2X_ELEMENTS = frozenset({"H", "C", "N", "O", "F", "S", "Cl"})
_CUTOFF_NM = 0.52  # radial AEV cutoff of ANI-1x / ANI-1ccx (5.2 angstrom)
_ELECTRO = "short-range only, implicit in the AEV within its cutoff; no long-range electrostatics"

#: what each model contains (reference, dispersion, elements, charges, cutoff)
MODEL_CONTENT = {
    "ani1x": TermContent("wB97X/6-31G(d)", "none", _ELECTRO, _HCNO, (0,), _CUTOFF_NM),
    "ani1ccx": TermContent("CCSD(T)*/CBS", "included", _ELECTRO, _HCNO, (0,), _CUTOFF_NM),
    "ani2x": TermContent("wB97X/6-31G(d)", "none", _ELECTRO, _ANI2X_ELEMENTS, (0,), 0.51),
}

_OPTIONS = ("model", "precision", "skin_nm", "weights_dir")
_DTYPES = {"float32": torch.float32, "float64": torch.float64}
_HA_A_TO_KJMOL_NM = units.HARTREE_PER_ANGSTROM_TO_KJMOL_PER_NM


# ---------------------------------------------------------------------------------------------
# construction
# ---------------------------------------------------------------------------------------------
def make_term(region: RegionInfo, **options) -> "AniTerm":
    """Build the ANI term for ``region``.

    Keyword-only options
    --------------------
    model : "ani1x" (default), "ani1ccx" or "ani2x"
    precision : "float32" (default; measured faster, see the module docstring) or "float64"
    skin_nm : neighbour-list skin, nm (default 0.05); any value >= 0 gives the same numbers
    weights_dir : folder with the weights (default: the cache of :mod:`mlbridge.models`)

    Raises
    ------
    OptionError for an unknown option or value; DomainError for elements or a net charge the
    model was not trained on (checked before any weights are read); ModelUnavailableError when
    the weights are not on disk (the message gives the fetch command).
    """
    unknown = sorted(set(options) - set(_OPTIONS))
    if unknown:
        raise OptionError(f"ani: unknown option(s) {unknown}; known options: {list(_OPTIONS)}")
    model = options.get("model", "ani1x")
    precision = options.get("precision", DEFAULT_PRECISION)
    skin_nm = options.get("skin_nm", DEFAULT_SKIN_NM)
    if model not in MODEL_CONTENT:
        raise OptionError(f"ani: model={model!r} unknown; choose one of {sorted(MODEL_CONTENT)}")
    if precision not in _DTYPES:
        raise OptionError(f"ani: precision={precision!r}; choose 'float32' or 'float64'")
    try:
        skin_nm = float(skin_nm)
    except (TypeError, ValueError):
        raise OptionError(f"ani: skin_nm={skin_nm!r} is not a number (nm)") from None
    if not (skin_nm >= 0.0 and math.isfinite(skin_nm)):
        raise OptionError(f"ani: skin_nm={skin_nm!r} must be >= 0 (nm)")
    check_domain(region, model)
    params = _load_parameters_cached(model, options.get("weights_dir"))
    return AniTerm(region, params, model=model, precision=precision, skin_nm=skin_nm)


def check_domain(region: RegionInfo, model: str) -> None:
    """Raise DomainError unless the region's elements and net charge are in ``model``'s domain."""
    content = MODEL_CONTENT[model]
    allowed = content.elements
    bad = [(i, s) for i, s in enumerate(region.symbols) if s not in allowed]
    if bad:
        shown = ", ".join(f"{i} ({s})" for i, s in bad[:20])
        more = f" and {len(bad) - 20} more" if len(bad) > 20 else ""
        alternatives = []
        if model != "ani2x" and all(s in _ANI2X_ELEMENTS for _, s in bad):
            alternatives.append("model 'ani2x' (H, C, N, O, F, S, Cl)")
        alternatives.append("the semi-empirical treatment 'xtb' (GFN2-xTB)")
        raise DomainError(
            f"{model} supports only the elements {{{', '.join(sorted(allowed))}}}; region atom(s) "
            f"{shown}{more} are outside it. Use " + " or ".join(alternatives) + ".")
    if content.net_charges is not None and region.net_charge not in content.net_charges:
        raise DomainError(
            f"{model} was trained on neutral molecules only (net charge 0); the region has net "
            f"charge {region.net_charge:+d}. Use the semi-empirical treatment 'xtb' (GFN2-xTB), "
            f"which handles charged molecules, or a neutral protonation state.")


def _weights_key(model, weights_dir):
    from .. import models

    path = models.locate(model, weights_dir)
    return str(path), path.stat().st_mtime_ns


@functools.lru_cache(maxsize=8)
def _load_by_key(model, path, _mtime):
    from .. import models

    return models.load_path(model, path)


def _load_parameters_cached(model, weights_dir=None):
    """Parameters read once per (model, file, modification time); terms rebuilt after
    unpickling reuse them and their packed networks."""
    path, mtime = _weights_key(model, weights_dir)  # raises ModelUnavailableError
    return _load_by_key(model, path, mtime)


# ---------------------------------------------------------------------------------------------
# packed networks
# ---------------------------------------------------------------------------------------------
class _ElementNetworks:
    """The M members' networks of one element, packed for batched evaluation.

    Layer 1: ``w1`` is (F_full, M * h1), the members' first layers side by side, so the shared
    AEV is multiplied once; deeper layers are (M, h_in, h_out) for one batched matmul each.
    Members with narrower layers are zero-padded (padding units contribute exactly zero).
    """

    def __init__(self, params, element, dtype):
        layers = [mem[element] for mem in params.members]
        M = len(layers)
        depth = len(layers[0])
        if any(len(l) != depth for l in layers):
            raise ValueError(f"{element}: all members' networks must have the same depth")
        widths = [max(l[k][0].shape[0] for l in layers) for k in range(depth)]
        f_full = layers[0][0][0].shape[1]
        h1 = widths[0]
        w1 = np.zeros((f_full, M, h1), np.float32)
        b1 = np.zeros((M, h1), np.float32)
        ws = [np.zeros((M, widths[k - 1], widths[k]), np.float32) for k in range(1, depth)]
        bs = [np.zeros((M, 1, widths[k]), np.float32) for k in range(1, depth)]
        for m, net in enumerate(layers):
            w, b = net[0]
            w1[:, m, : w.shape[0]] = w.T
            b1[m, : w.shape[0]] = b
            for k in range(1, depth):
                w, b = net[k]
                ws[k - 1][m, : w.shape[1], : w.shape[0]] = w.T
                bs[k - 1][m, 0, : w.shape[0]] = b
        t = lambda a: torch.from_numpy(a).to(dtype).contiguous()  # noqa: E731
        self.w1_full = t(w1.reshape(f_full, M * h1))
        self.b1 = t(b1.reshape(M * h1))
        self.ws = [t(w) for w in ws]
        self.bs = [t(b) for b in bs]
        self.wts = [w.transpose(1, 2) for w in self.ws]
        self.n_members, self.h1 = M, h1

    def first_layer(self, columns: torch.Tensor):
        """First-layer weights restricted to these AEV columns (the others are zero), and their
        transpose. A new tensor: the packed networks are shared between terms."""
        w1 = self.w1_full.index_select(0, columns).contiguous()
        return w1, w1.t()

    def energies_and_input_grad(self, x, w1, w1t):
        """x: (n, F') AEVs of this element's atoms; w1, w1t from :meth:`first_layer`. Returns
        the members' summed NN energies (M,) and d(mean_m E_m)/dx (n, F'), by a hand-written
        backward."""
        n = x.shape[0]
        M, h1 = self.n_members, self.h1
        celu = torch.nn.functional.celu
        a = celu(torch.addmm(self.b1, x, w1), alpha=0.1)  # (n, M*h1)
        a = a.view(n, M, h1).transpose(0, 1)  # (M, n, h1)
        acts = [a]
        last = len(self.ws) - 1
        for k in range(len(self.ws)):
            a = torch.baddbmm(self.bs[k], a, self.ws[k])
            if k < last:
                a = celu(a, alpha=0.1)
                acts.append(a)
        member = a.sum(dim=(1, 2))  # (M,)
        # backward of mean_m sum_atoms y_m
        g = self.wts[last].expand(M, n, -1) * (1.0 / M)
        for k in range(last, -1, -1):
            g = g * (1.0 + 10.0 * acts[k].clamp(max=0.0))  # CELU'(z) = 1 + min(celu(z)/alpha, 0)
            if k > 0:
                g = torch.bmm(g, self.wts[k - 1])
        g = g.transpose(0, 1).reshape(n, M * h1)
        return member, torch.mm(g, w1t)


def _packed(params, element, precision):
    """Packed networks of one element, cached on the parameters object (built once)."""
    cache = params.__dict__.setdefault("_mlbridge_packed", {})
    key = (element, precision)
    if key not in cache:
        cache[key] = _ElementNetworks(params, element, _DTYPES[precision])
    return cache[key]


# ---------------------------------------------------------------------------------------------
# the term
# ---------------------------------------------------------------------------------------------
class AniTerm(RegionTerm):
    """ANI ensemble of the region in vacuum; see the module docstring for the method."""

    uses_environment = False

    def __init__(self, region: RegionInfo, params, *, model: str = "ani1x",
                 precision: str = DEFAULT_PRECISION, skin_nm: float = DEFAULT_SKIN_NM):
        self.name = model
        self.model = model
        self.precision = precision
        self.content = MODEL_CONTENT[model]
        self.dtype = _DTYPES[precision]
        self.region = region
        self.n_atoms = n = region.n_atoms
        self.skin_a = float(skin_nm) / units.ANGSTROM_NM
        p = params
        sym_index = {s: k for k, s in enumerate(p.symbols)}
        species = np.array([sym_index[s] for s in region.symbols], dtype=np.int64)
        present = sorted(set(species.tolist()))  # model species indices, model order
        elements = tuple(p.symbols[k] for k in present)
        self.elements = elements
        S = len(p.symbols)
        # compact species index among present elements; AEV rows are ordered by element, so each
        # element's atoms are one contiguous block of rows
        compact = {k: c for c, k in enumerate(present)}
        self.species_c = np.array([compact[k] for k in species], dtype=np.int64)
        counts = np.bincount(self.species_c, minlength=len(present))
        offsets = np.concatenate([[0], np.cumsum(counts)[:-1]])
        order = np.argsort(self.species_c, kind="stable")  # row -> atom
        self.slot = np.empty(n, dtype=np.int64)  # atom -> row
        self.slot[order] = np.arange(n)
        self._blocks = [(int(o), int(o + c)) for o, c in zip(offsets, counts)]
        self.n_present = Ep = len(present)
        # AEV column bookkeeping, in the model's full layout
        n_rad, n_ang_r, n_ang_s = len(p.radial_shifts), len(p.angular_shifts), len(p.angular_sections)
        self.n_rad, self.n_ang = n_rad, n_ang_r * n_ang_s
        triu = np.zeros((S, S), dtype=np.int64)
        iu = np.triu_indices(S)
        triu[iu] = np.arange(len(iu[0]))
        triu[iu[1], iu[0]] = np.arange(len(iu[0]))
        # compact pair id among present elements (ordered by the model's pair id)
        pairs_present = sorted({int(triu[a, b]) for a in present for b in present})
        self._pair_compact = {pid: c for c, pid in enumerate(pairs_present)}
        self._pairs_present = pairs_present
        self._pair_of_compact_species = np.array(
            [[self._pair_compact[int(triu[present[a], present[b]])] for b in range(Ep)]
             for a in range(Ep)], dtype=np.int64)
        self._radial_columns = np.concatenate(
            [np.arange(k * n_rad, (k + 1) * n_rad) for k in present])
        self._ang_col0 = S * n_rad
        # constants
        dt = self.dtype
        self.rc_r, self.rc_a = float(p.radial_cutoff), float(p.angular_cutoff)
        self.eta_r = float(np.float32(p.radial_eta))
        # torchani keeps the AEV shifts and sections as float32 buffers; rounding them the same
        # way makes float64 results equal torchani's float64 model to ~1e-8 (not ~1e-6).
        f32 = lambda v: np.asarray(v, dtype=np.float32).astype(np.float64)  # noqa: E731
        self.shf_r = torch.tensor(f32(p.radial_shifts), dtype=dt)
        self.eta_a = float(np.float32(p.angular_eta))
        self.zeta = float(np.float32(p.angular_zeta))
        self.shf_a = torch.tensor(f32(p.angular_shifts), dtype=dt)
        sections = f32(p.angular_sections)
        self.cos_sec = torch.tensor(np.cos(sections), dtype=dt)
        self.sin_sec = torch.tensor(np.sin(sections), dtype=dt)
        self.self_energy_sum = float(sum(p.self_energies[s] for s in region.symbols))  # hartree
        # networks (cached across terms built from the same parameters)
        self.nets = [_packed(p, e, precision) for e in elements]
        self._w1 = None  # per-term first layers for the current AEV columns
        self.n_members = self.nets[0].n_members
        if any(net.n_members != self.n_members for net in self.nets):
            raise ValueError("all elements must have the same ensemble size")
        self._ref = None  # positions (angstrom) at the last neighbour-list build
        self.n_rebuilds = 0

    # -- neighbour list ------------------------------------------------------------------------
    def _needs_rebuild(self, x: np.ndarray) -> bool:
        if self._ref is None:
            return True
        d = x - self._ref
        d -= d.mean(axis=0)
        return float(np.max(np.einsum("ij,ij->i", d, d))) > (0.5 * self.skin_a) ** 2

    def _rebuild(self, x: np.ndarray) -> None:
        n = self.n_atoms
        diff = x[None, :, :] - x[:, None, :]
        dist = np.sqrt(np.einsum("ijk,ijk->ij", diff, diff))
        iu, ju = np.triu_indices(n, 1)
        keep = dist[iu, ju] < self.rc_r + self.skin_a
        pi, pj = iu[keep], ju[keep]
        pair_id = -np.ones((n, n), dtype=np.int64)
        pair_id[pi, pj] = np.arange(len(pi))
        pair_id[pj, pi] = np.arange(len(pi))
        sc = self.species_c
        Ep = self.n_present
        rad_index = np.concatenate([self.slot[pi] * Ep + sc[pj], self.slot[pj] * Ep + sc[pi]])
        # angular triples: centre c, sides j < k, both within rc_a + skin of c
        near = (dist < self.rc_a + self.skin_a) & ~np.eye(n, dtype=bool)
        tc, tj, tk = [], [], []
        for c in range(n):
            nb = np.nonzero(near[c])[0]
            if len(nb) < 2:
                continue
            a, b = np.triu_indices(len(nb), 1)
            tc.append(np.full(len(a), c))
            tj.append(nb[a])
            tk.append(nb[b])
        if tc:
            tc, tj, tk = (np.concatenate(v) for v in (tc, tj, tk))
        else:
            tc = tj = tk = np.zeros(0, dtype=np.int64)
        pa, pb = pair_id[tc, tj], pair_id[tc, tk]  # the pairs of the two legs
        pair_c = self._pair_of_compact_species[sc[tj], sc[tk]]
        active = sorted(set(pair_c.tolist()))  # compact pair ids with at least one triple
        remap = -np.ones(len(self._pairs_present), dtype=np.int64)
        remap[active] = np.arange(len(active))
        n_act = len(active)
        ang_index = self.slot[tc] * max(n_act, 1) + remap[pair_c]
        # AEV columns kept, in the model's full layout: radial blocks of present elements, then
        # angular blocks of active pairs
        cols = [self._radial_columns]
        for c in active:
            pid = self._pairs_present[c]
            cols.append(self._ang_col0 + pid * self.n_ang + np.arange(self.n_ang))
        columns = torch.from_numpy(np.concatenate(cols))
        if self._w1 is None or not torch.equal(self._columns, columns):
            self._columns = columns
            self._w1 = [net.first_layer(columns) for net in self.nets]
        L = torch.from_numpy
        self._pi, self._pj = L(pi), L(pj)
        self._rad_index = L(rad_index)
        self._pa, self._pb = L(pa), L(pb)
        self._tc, self._tj, self._tk = L(tc), L(tj), L(tk)
        self._force_index_pairs = L(np.concatenate([pj, pi]))
        self._force_index = L(np.concatenate([pj, pi, tj, tk, tc]))
        self._ang_index = L(ang_index)
        self._n_act = n_act
        self._ref = x.copy()
        self.n_rebuilds += 1

    # -- AEV, forward and hand-written backward --------------------------------------------------
    def _aev_forward(self, xt: torch.Tensor):
        """Compact AEVs (n, F'), rows ordered by element, of xt (n, 3) angstrom, and what the
        backward needs."""
        Ep = self.n_present
        n = self.n_atoms
        v = xt.index_select(0, self._pj) - xt.index_select(0, self._pi)  # (P, 3), i -> j
        r = torch.linalg.vector_norm(v, dim=1)  # (P,)
        w = math.pi / self.rc_r
        inside = r < self.rc_r
        zero = torch.zeros_like(r)
        fc = torch.where(inside, 0.5 * torch.cos(r * w) + 0.5, zero)
        dfc = torch.where(inside, (-0.5 * w) * torch.sin(r * w), zero)
        d = r.unsqueeze(1) - self.shf_r  # (P, R)
        ex = 0.25 * torch.exp(-self.eta_r * d * d)
        rad = ex * fc.unsqueeze(1)
        radial = xt.new_zeros((n * Ep, self.n_rad)).index_add_(0, self._rad_index,
                                                               torch.cat([rad, rad]))
        radial = radial.view(n, Ep * self.n_rad)
        cache = {"v": v, "r": r, "d": d, "ex": ex, "fc": fc, "dfc": dfc}
        if self._n_act == 0:
            return radial, cache
        # angular: triple (c; j, k), legs a = x_j - x_c, b = x_k - x_c
        xc = xt.index_select(0, self._tc)
        va = xt.index_select(0, self._tj) - xc
        vb = xt.index_select(0, self._tk) - xc
        ra = r.index_select(0, self._pa)
        rb = r.index_select(0, self._pb)
        wa = math.pi / self.rc_a
        inside_a = r < self.rc_a
        fca_p = torch.where(inside_a, 0.5 * torch.cos(r * wa) + 0.5, zero)
        dfca_p = torch.where(inside_a, (-0.5 * wa) * torch.sin(r * wa), zero)
        fca, fcb = fca_p.index_select(0, self._pa), fca_p.index_select(0, self._pb)
        dfca, dfcb = dfca_p.index_select(0, self._pa), dfca_p.index_select(0, self._pb)
        inv = 1.0 / torch.clamp(ra * rb, min=1e-10)
        cos_t = (va * vb).sum(dim=1) * inv
        x95 = (0.95 * cos_t).unsqueeze(1)  # torchani/NeuroChem: theta = acos(0.95 cos)
        s95 = torch.sqrt(1.0 - x95 * x95)
        # cos(acos(x) - theta_l) = x cos(theta_l) + sqrt(1 - x^2) sin(theta_l)
        q = 0.5 * (1.0 + x95 * self.cos_sec + s95 * self.sin_sec)  # (T, L)
        qz1 = q ** (self.zeta - 1.0)
        A = 2.0 * q * qz1
        fcab = fca * fcb
        dm = (0.5 * (ra + rb)).unsqueeze(1) - self.shf_a  # (T, K)
        exa = torch.exp(-self.eta_a * dm * dm)
        Rk = exa * fcab.unsqueeze(1)
        terms = (Rk.unsqueeze(2) * A.unsqueeze(1)).reshape(-1, self.n_ang)  # (T, K*L)
        angular = xt.new_zeros((n * self._n_act, self.n_ang)).index_add_(0, self._ang_index,
                                                                         terms)
        angular = angular.view(n, self._n_act * self.n_ang)
        cache.update(va=va, vb=vb, ra=ra, rb=rb, fca=fca, fcb=fcb, dfca=dfca, dfcb=dfcb, inv=inv,
                     cos_t=cos_t, x95=x95, s95=s95, qz1=qz1, A=A, fcab=fcab, dm=dm, exa=exa, Rk=Rk)
        return torch.cat([radial, angular], dim=1), cache

    def _aev_backward(self, c: dict, gx: torch.Tensor) -> torch.Tensor:
        """dE/dx (n, 3) from dE/dAEV gx (n, F') by the chain rule written out."""
        Ep, n = self.n_present, self.n_atoms
        nr = Ep * self.n_rad
        P = c["r"].shape[0]
        g_rad = gx[:, :nr].reshape(n * Ep, self.n_rad).index_select(0, self._rad_index)
        g_rad = g_rad[:P] + g_rad[P:]  # (P, R): both atoms of a pair see the same term
        # d rad / d r = 0.25 exp(-eta d^2) (-2 eta d fc + fc')
        drad = c["ex"] * (c["dfc"].unsqueeze(1) - (2.0 * self.eta_r) * c["d"] * c["fc"].unsqueeze(1))
        dedr = (g_rad * drad).sum(dim=1)
        g_pair = c["v"] * (dedr / c["r"]).unsqueeze(1)  # dE/dv, v = x_j - x_i
        if self._n_act == 0:
            idx = self._force_index_pairs
            vals = torch.cat([g_pair, -g_pair])
            return g_pair.new_zeros((n, 3)).index_add_(0, idx, vals)
        K, L = len(self.shf_a), len(self.cos_sec)
        gT = gx[:, nr:].reshape(n * self._n_act, K, L).index_select(0, self._ang_index)  # (T,K,L)
        Rk, A = c["Rk"], c["A"]
        gA = torch.bmm(Rk.unsqueeze(1), gT).squeeze(1)  # (T, L)  sum_k g R_k
        gR = torch.bmm(gT, A.unsqueeze(2)).squeeze(2)  # (T, K)  sum_l g A_l
        # dA_l/dx = zeta q^(zeta-1) (cos_l - x/s sin_l)
        x95, s95 = c["x95"], c["s95"]
        dAdx = self.zeta * c["qz1"] * (self.cos_sec - (x95 / s95) * self.sin_sec)
        dedcos = 0.95 * (gA * dAdx).sum(dim=1)  # (T,)
        gex = gR * c["exa"]
        q1 = gex.sum(dim=1)
        q2 = (gex * c["dm"]).sum(dim=1)
        common = -self.eta_a * q2 * c["fcab"]  # d(mean r)/d ra = 1/2 absorbed: -2 eta dm / 2
        dedra = common + q1 * c["dfca"] * c["fcb"]
        dedrb = common + q1 * c["fca"] * c["dfcb"]
        va, vb, ra, rb, inv, cos_t = c["va"], c["vb"], c["ra"], c["rb"], c["inv"], c["cos_t"]
        # d cos / d va = vb/(ra rb) - cos va/ra^2
        ga = (dedcos * inv).unsqueeze(1) * vb + ((dedra - dedcos * cos_t / ra) / ra).unsqueeze(1) * va
        gb = (dedcos * inv).unsqueeze(1) * va + ((dedrb - dedcos * cos_t / rb) / rb).unsqueeze(1) * vb
        vals = torch.cat([g_pair, -g_pair, ga, gb, -(ga + gb)])
        return va.new_zeros((n, 3)).index_add_(0, self._force_index, vals)

    # -- evaluation ------------------------------------------------------------------------------
    def energy_forces(self, region_nm, box_nm=None, environment_nm=None) -> TermResult:
        """Energy (kJ/mol) and forces (kJ/mol/nm) of the region in vacuum; ``box_nm`` ignored."""
        x = np.asarray(region_nm, dtype=np.float64).reshape(self.n_atoms, 3) / units.ANGSTROM_NM
        rebuilt = self._needs_rebuild(x)
        if rebuilt:
            self._rebuild(x)
        # centred in float64 first: the energy is translation invariant, and float32 coordinates
        # near the origin keep ~7x more digits of the interatomic vectors than box coordinates
        xt = torch.from_numpy(x - x.mean(axis=0)).to(self.dtype)
        with torch.no_grad():
            aev, cache = self._aev_forward(xt)
            member_nn = 0.0
            grads = []
            for net, (w1, w1t), (lo, hi) in zip(self.nets, self._w1, self._blocks):
                e_m, g = net.energies_and_input_grad(aev[lo:hi], w1, w1t)
                member_nn = member_nn + e_m
                grads.append(g)
            gx = torch.cat(grads) if len(grads) > 1 else grads[0]
            grad = self._aev_backward(cache, gx)
        member_ha = member_nn.double().numpy() + self.self_energy_sum
        energy_ha = float(member_ha.mean())
        forces = -grad.double().numpy() * _HA_A_TO_KJMOL_NM
        member_kj = member_ha * units.HARTREE_KJMOL
        std = float(np.std(member_kj, ddof=1)) if len(member_kj) > 1 else 0.0
        extras = {
            "member_energies_kjmol": member_kj.tolist(),
            "ensemble_std_kjmol": std,
            "ensemble_std_per_atom_kjmol": std / math.sqrt(self.n_atoms),
            "neighbour_list_rebuilt": rebuilt,
        }
        return TermResult(energy=energy_ha * units.HARTREE_KJMOL, region_forces=forces,
                          extras=extras)

    @property
    def n_aev_columns(self) -> int:
        """AEV columns evaluated (of the model's full width); set by the last neighbour list."""
        return 0 if self._w1 is None else int(self._columns.numel())

    def describe(self):
        d = super().describe()
        d.update(model=self.model, precision=self.precision, skin_nm=self.skin_a * units.ANGSTROM_NM,
                 ensemble_size=self.n_members)
        return d


# ---------------------------------------------------------------------------------------------
# the stock reference (tests, benchmark)
# ---------------------------------------------------------------------------------------------
def stock_ensemble(model_name: str = "ani1x", precision: str = DEFAULT_PRECISION,
                   weights_dir: Optional[os.PathLike] = None):
    """torchani's own ensemble model (torchani.arch.ANI) from the same weight files, in the given
    precision; input (atomic numbers (1, n), angstrom (1, n, 3)), output hartree."""
    from .. import models

    if precision not in _DTYPES:
        raise OptionError(f"precision={precision!r}; choose 'float32' or 'float64'")
    return models.stock_model(model_name, weights_dir=weights_dir, dtype=_DTYPES[precision])


def stock_energy_forces(model, atomic_numbers, region_nm):
    """Energy (kJ/mol), forces (kJ/mol/nm) and member energies (kJ/mol) from a stock torchani
    model by autograd, converting angstrom/hartree at the edge."""
    dtype = next(model.parameters()).dtype
    species = torch.tensor([list(atomic_numbers)], dtype=torch.long)
    x = torch.tensor(np.asarray(region_nm, dtype=np.float64) / units.ANGSTROM_NM,
                     dtype=dtype).unsqueeze(0).requires_grad_(True)
    e = model((species, x)).energies.sum()
    (g,) = torch.autograd.grad(e, x)
    with torch.no_grad():
        members = model((species, x.detach()), ensemble_values=True).energies.reshape(-1)
    return (float(e.detach()) * units.HARTREE_KJMOL,
            -g[0].double().numpy() * _HA_A_TO_KJMOL_NM,
            members.double().numpy() * units.HARTREE_KJMOL)
