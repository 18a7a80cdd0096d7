r"""QEq charge-equilibration layer: the region's polarisation by the fixed charges of the water.

Charges :math:`q` of the region minimise, under :math:`\sum_i q_i = Q` (the region's net charge),

.. math::

    L(q; x, \phi) = \sum_i (\chi_i + \phi_i) q_i + \tfrac12 \sum_i J_i q_i^2
                    + \tfrac12 \sum_{i \ne j} q_i q_j \gamma_{ij}(r_{ij}),
    \qquad
    \gamma_{ij}(r) = k_e \frac{\operatorname{erf}\!\left(r / \sqrt{s_i^2 + s_j^2}\right)}{r}

(Rappé & Goddard 1991 with Gaussian-charge shielding). With the hardness matrix
:math:`H_{ii} = J_i`, :math:`H_{ij} = \gamma_{ij}` the minimum is ONE linear (KKT) system,

.. math::

    \begin{pmatrix} H & 1 \\ 1^T & 0 \end{pmatrix}
    \begin{pmatrix} q \\ -\mu \end{pmatrix} =
    \begin{pmatrix} -(\chi + \phi) \\ Q \end{pmatrix},

where :math:`\mu` is the common chemical potential :math:`\partial L / \partial q_i`. The layer
energy is referenced to vacuum so the ML potential's gas-phase energy is not counted twice:

.. math::

    U = \min_q L(q; x, \phi) - \min_q L(q; x, 0)
      = \tfrac12 \sum_i \phi_i \,(q^\mathrm{vac}_i + q^\mathrm{env}_i)

(the second form follows from the two stationarity conditions and is what is evaluated: it has
no cancellation between two large numbers). Because :math:`L` is stationary in :math:`q`, the
forces are the partial derivatives of :math:`L` at the optimal charges (no dq/dx term); they are
analytic here and checked by central finite differences in ``tests/test_qeq.py``.

Environment potential
---------------------
:math:`\phi_i` (kJ/mol/e) is the Coulomb potential :math:`k_e \sum_a q_a / r_{ia}` of the
environment's fixed point charges (``region.environment_charges``) at region atom i, summed over
WHOLE environment molecules (``region.environment_molecules``). The environment charges are
point charges and the region-environment pairs are not shielded (the region atoms' Gaussian
width is used only inside the region):

- each molecule is first made whole (every atom imaged next to the molecule's first atom), then
  the molecule as a whole is placed at the minimum image of its geometric centre relative to the
  region's geometric centre (box vectors as rows, OpenMM's reduced triclinic form; exact minimum
  image for orthorhombic, triclinic and truncated-octahedron boxes: a reduction followed by a
  search over the 27 neighbouring images);
- the group distance is :math:`d_m = |c_m - c_R|`, molecule centre to region centre;
- the molecule's contribution is multiplied by the switch
  :math:`S(t) = 1 - 10 t^3 + 15 t^4 - 6 t^5`, :math:`t = (d_m - r_\mathrm{on}) / (r_c - r_\mathrm{on})`,
  :math:`r_\mathrm{on} = r_c - w` (C2: S, S' and S'' vanish at :math:`r_c`, so energy and force go
  smoothly to zero); the switch's derivative puts forces on every atom of the molecule (1/n_m
  each) and of the region (1/n_R each).

The region-water Coulomb beyond the cutoff (and the part removed by the switch) is dropped: the
region's charges are zero in the classical NonbondedForce under this layer, so a charged region
loses its long-range Born-like solvation beyond :math:`r_c` (state this in any report).

Parameters
----------
``rappe-goddard``: :math:`\chi` and :math:`J` from Rappé & Goddard's Table I (from memory; eV,
converted with 1 eV = 96.4853 kJ/mol from CODATA 2018), simplified as is common in codes: no
charge-dependent hydrogen hardness, Gaussian instead of Slater (ns) shielding.

=======  ========  ==========  ============  ==============  ========
element  chi (eV)  chi kJ/mol  J (eV)        J kJ/mol/e^2    s (nm)
=======  ========  ==========  ============  ==============  ========
H        4.528      436.9      13.8904       1340.2          0.0827
C        5.343      515.5      10.126         977.0          0.1135
N        6.899      665.7      11.760        1134.7          0.0977
O        8.741      843.4      13.364        1289.4          0.0860
F        10.874    1049.2      14.948        1442.3          0.0769
S        6.928      668.5       8.972         865.7          0.1281
Cl       8.564      826.3       9.892         954.4          0.1161
=======  ========  ==========  ============  ==============  ========

Widths (a rule of ours, not from the paper): :math:`s_i = k_e \sqrt{2/\pi} / J_i`, so that the
self-Coulomb energy of the Gaussian charge equals :math:`J_i`, i.e.
:math:`\lim_{r \to 0} \gamma_{ii}(r) = J_i`. Then :math:`H` is the Coulomb Gram matrix of Gaussian
charge densities, positive definite at every geometry: the QEq minimum exists and is unique and no
polarisation catastrophe can occur. (The published radii R_i used as widths would give narrower
Gaussians whose bonded :math:`\gamma_{ij}` exceeds :math:`\sqrt{J_i J_j}`: for C-H at 0.109 nm,
1187 against 1144 kJ/mol/e^2, so H would not be positive definite.)

``anchored`` (default): :math:`J` and :math:`s` as above; :math:`\chi` is re-anchored at every
geometry, :math:`\chi_i(x) = -J_i q^0_i - \sum_{j \ne i} \gamma_{ij}(x) q^0_j` (the constant
:math:`\mu` is 0), so the vacuum solution is exactly :math:`q^0` = ``region.classical_charges``
(AM1-BCC). Then :math:`U = \sum_i q^0_i \phi_i - \tfrac12 \phi^T P \phi`: mechanical embedding
plus the linear response of the QEq model,
:math:`P = H^{-1} - H^{-1} 1 1^T H^{-1} / (1^T H^{-1} 1)` (charge-conserving). The forces then
include the geometry dependence of :math:`\chi(x)`. The classical charges are shifted uniformly
by at most 1e-3 e in total so they sum exactly to the net charge.

References
----------
- A. K. Rappé, W. A. Goddard III, J. Phys. Chem. 95, 3358 (1991) (QEq).

Output (``TermResult``)
-----------------------
=========================  ========  ==========================================================
field                      shape     unit
=========================  ========  ==========================================================
energy                     scalar    kJ/mol
region_forces              (n_R, 3)  kJ/mol/nm
environment_forces         (n_E, 3)  kJ/mol/nm (zero outside the cutoff)
extras["charges"]          (n_R,)    e, in the environment's field
extras["charges_vacuum"]   (n_R,)    e, with phi = 0
extras["dipole_debye"]     scalar    D, |sum q (r - c_R)| (c_R the geometric centre)
extras["dipole_vacuum_debye"] scalar D
extras["n_molecules_in_cutoff"] int
=========================  ========  ==========================================================
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy.linalg.lapack import dposv as _dposv
from scipy.special import erf

from .. import units
from ..errors import DomainError, OptionError
from .base import RegionInfo, RegionTerm, TermContent, TermResult

__all__ = [
    "QEqTerm",
    "make_term",
    "solve_qeq",
    "shielded_coulomb",
    "switch",
    "RAPPE_GODDARD_EV",
    "EV_KJMOL",
]

#: eV in kJ/mol: CODATA 2018 Hartree energy in eV (27.211386245988) and units.HARTREE_KJMOL.
EV_KJMOL = units.HARTREE_KJMOL / 27.211386245988

#: Rappé & Goddard, J. Phys. Chem. 95, 3358 (1991), Table I: (chi, J) in eV. From memory.
RAPPE_GODDARD_EV = {
    "H": (4.528, 13.8904),
    "C": (5.343, 10.126),
    "N": (6.899, 11.760),
    "O": (8.741, 13.364),
    "F": (10.874, 14.948),
    "S": (6.928, 8.972),
    "Cl": (8.564, 9.892),
}

_MODES = ("anchored", "rappe-goddard")
_TWO_OVER_SQRT_PI = 2.0 / math.sqrt(math.pi)


def gaussian_width_nm(hardness_kjmol: float) -> float:
    """Width s (nm) whose Gaussian self-Coulomb k_e sqrt(2/pi)/s equals the hardness J."""
    return units.COULOMB_KJMOL_NM * math.sqrt(2.0 / math.pi) / hardness_kjmol


def shielded_coulomb(r_nm, sigma_nm):
    """gamma(r) = k_e erf(r/sigma)/r (kJ/mol/e^2) and d gamma/dr (kJ/mol/nm/e^2), r > 0."""
    r = np.asarray(r_nm, dtype=float)
    u = r / sigma_nm
    e = erf(u)
    g = units.COULOMB_KJMOL_NM * e / r
    dg = units.COULOMB_KJMOL_NM * (_TWO_OVER_SQRT_PI * np.exp(-u * u) / (sigma_nm * r) - e / (r * r))
    return g, dg


def switch(d_nm, r_on_nm: float, r_cut_nm: float):
    """C2 switch S(d) = 1 - 10t^3 + 15t^4 - 6t^5 from r_on to r_cut, and dS/dd (1/nm)."""
    d = np.asarray(d_nm, dtype=float)
    w = r_cut_nm - r_on_nm
    t = np.clip((d - r_on_nm) / w, 0.0, 1.0)
    s = 1.0 - t**3 * (10.0 - 15.0 * t + 6.0 * t * t)
    ds = -30.0 * t * t * (1.0 - t) ** 2 / w
    return s, ds


def solve_qeq(chi, hardness, total_charge: float):
    """Minimise chi.q + 1/2 q^T H q under sum q = Q.

    With H positive definite (always so for this module's Gaussian widths) the minimum is
    q = a + mu b with a = -H^-1 chi, b = H^-1 1 and mu = (Q - 1.a) / (1.b): one Cholesky
    factorisation (LAPACK ``dposv``) for all right-hand sides. Otherwise the KKT system

        [[H, 1], [1^T, 0]] [q, -mu] = [-chi, Q]

    is solved directly.

    Parameters
    ----------
    chi : (n,) or (n, k) array, kJ/mol/e (k right-hand sides share one factorisation)
    hardness : (n, n) array, kJ/mol/e^2, H_ii = J_i, H_ij = gamma_ij
    total_charge : e

    Returns
    -------
    q : (n,) or (n, k) array, e
    mu : scalar or (k,) array, kJ/mol/e, the common chemical potential dL/dq_i
    """
    chi = np.asarray(chi, dtype=float)
    n = hardness.shape[0]
    cols = chi.reshape(n, -1)
    rhs = np.empty((n, cols.shape[1] + 1))
    rhs[:, :-1] = -cols
    rhs[:, -1] = 1.0
    _, sol, info = _dposv(hardness, rhs)
    if info == 0:
        a, b = sol[:, :-1], sol[:, -1]
        mu = (total_charge - a.sum(axis=0)) / b.sum()
        q = a + b[:, None] * mu
        return (q[:, 0], float(mu[0])) if chi.ndim == 1 else (q, mu)
    a = np.zeros((n + 1, n + 1))
    a[:n, :n] = hardness
    a[:n, n] = 1.0
    a[n, :n] = 1.0
    rhs = np.zeros((n + 1,) + chi.shape[1:])
    rhs[:n] = -chi
    rhs[n] = total_charge
    sol = np.linalg.solve(a, rhs)
    return sol[:n], -sol[n]


def _min_image(d, box, inv_box):
    """Nearest lattice-equivalent of short displacement rows d (n, 3); box vectors as rows.

    Rounds the fractional coordinates d @ box^-1; exact for vectors much shorter than the box
    (used to make molecules whole), not a general minimum image (see _exact_min_image).
    """
    if inv_box[0, 1] == inv_box[0, 2] == inv_box[1, 2] == inv_box[1, 0] == inv_box[2, 0] == inv_box[2, 1] == 0.0:
        return d - np.round(d * inv_box.diagonal()) * box.diagonal()  # orthorhombic: same, cheaper
    return d - np.round(d @ inv_box) @ box


_NEIGHBOUR_SHIFTS = np.array(
    [(i, j, k) for i in (-1, 0, 1) for j in (-1, 0, 1) for k in (-1, 0, 1)], dtype=float
)


def _box_widths(box):
    """Perpendicular widths (nm) of the cell spanned by the rows of box."""
    vol = abs(np.linalg.det(box))
    return vol / np.linalg.norm(np.cross(box[[1, 2, 0]], box[[2, 0, 1]]), axis=1)


def _exact_min_image(d, box, w_min=None):
    """Minimum image for a box in OpenMM's reduced form (a along x, b in the xy plane).

    OpenMM's sequential reduction (c, then b, then a) brings d into the box's reduced cell. A
    reduced vector shorter than half the smallest width is the minimum image (every nonzero
    lattice vector is at least that width long); for the others a search over the 27
    neighbouring images picks the shortest. Exact for orthorhombic, triclinic and
    truncated-octahedron boxes.
    """
    if box[1, 0] == box[2, 0] == box[2, 1] == 0.0:  # orthorhombic: the reduction is exact
        diag = box.diagonal()
        return d - np.round(d / diag) * diag
    d = np.array(d, dtype=float)
    d -= np.round(d[:, 2] / box[2, 2])[:, None] * box[2]
    d -= np.round(d[:, 1] / box[1, 1])[:, None] * box[1]
    d -= np.round(d[:, 0] / box[0, 0])[:, None] * box[0]
    half = 0.5 * (_box_widths(box).min() if w_min is None else w_min)
    far = np.nonzero(np.einsum("mi,mi->m", d, d) >= half * half)[0]
    if far.size:
        cand = d[far, None, :] + (_NEIGHBOUR_SHIFTS @ box)[None, :, :]
        best = np.argmin(np.einsum("mki,mki->mk", cand, cand), axis=1)
        d[far] = cand[np.arange(far.size), best]
    return d


class QEqTerm(RegionTerm):
    """QEq embedding of the region in the environment's fixed charges (module docstring)."""

    name = "qeq"
    uses_environment = True

    def __init__(self, region: RegionInfo, mode: str, cutoff_nm: float, switch_width_nm: float,
                 skin_nm: float = 0.2):
        self.region = region
        self.mode = mode
        self.cutoff_nm = float(cutoff_nm)
        self.switch_width_nm = float(switch_width_nm)
        self.skin_nm = float(skin_nm)
        self.r_on_nm = self.cutoff_nm - self.switch_width_nm
        n = region.n_atoms
        bad = sorted(set(region.symbols) - set(RAPPE_GODDARD_EV))
        if bad:
            raise DomainError(
                f"QEq has parameters for {sorted(RAPPE_GODDARD_EV)} only; the region contains "
                f"{bad}. Use a treatment without the QEq layer (e.g. 'ml+d3')."
            )
        chi_ev, j_ev = np.array([RAPPE_GODDARD_EV[s] for s in region.symbols], dtype=float).T.reshape(2, n)
        self.chi = chi_ev * EV_KJMOL  # kJ/mol/e (rappe-goddard mode)
        self.hardness_diag = j_ev * EV_KJMOL  # kJ/mol/e^2
        self.widths_nm = np.array([gaussian_width_nm(j) for j in self.hardness_diag])
        self._sigma = np.sqrt(self.widths_nm[:, None] ** 2 + self.widths_nm[None, :] ** 2)
        self.total_charge = float(region.net_charge)

        self.anchor_charges = None
        if mode == "anchored":
            q0 = np.asarray(region.classical_charges, dtype=float)
            if q0.shape != (n,):
                raise DomainError(
                    f"anchored QEq needs one classical charge per region atom ({n}), got "
                    f"{q0.shape[0] if q0.ndim else 0}; give RegionInfo.classical_charges or use "
                    "mode='rappe-goddard'."
                )
            excess = q0.sum() - self.total_charge
            if abs(excess) > 1e-3:
                raise DomainError(
                    f"the classical charges sum to {q0.sum():.6f} e but the region's net charge is "
                    f"{region.net_charge}; fix the charges or the net charge."
                )
            self.anchor_charges = q0 - excess / n

        qe = np.asarray(region.environment_charges, dtype=float)
        mol = np.asarray(region.environment_molecules)
        if qe.size and mol.shape != qe.shape:
            raise ValueError(
                f"RegionInfo has {qe.size} environment charges but {mol.size} environment "
                "molecule ids; give one molecule id per environment atom."
            )
        self.env_charges = qe
        self.n_env = qe.size
        if self.n_env:
            _, mol_index = np.unique(mol, return_inverse=True)
            self._mol_index = mol_index.ravel()
            self.n_mol = int(self._mol_index.max()) + 1
            self._order = np.argsort(self._mol_index, kind="stable")  # atoms grouped by molecule
            self._sizes = np.bincount(self._mol_index, minlength=self.n_mol)
            self._starts = np.concatenate([[0], np.cumsum(self._sizes)[:-1]])
            self._all = self._group(np.arange(self.n_mol))
        self._list = None  # Verlet list of molecules (see _verlet_list)
        self.list_builds = 0
        self._iu = np.triu_indices(n, 1)
        self._sigma_pairs = self._sigma[self._iu]
        self._box_key = None
        self._box_cache = None

        self.content = TermContent(
            reference="QEq (Rappé-Goddard 1991), Gaussian shielding"
            + (", anchored to the classical charges" if mode == "anchored" else ""),
            dispersion="none",
            electrostatics=(
                f"region polarisation by the environment's fixed charges within {self.cutoff_nm} nm "
                "(group cutoff, C2 switch); beyond it dropped"
            ),
            elements=frozenset(RAPPE_GODDARD_EV),
            net_charges=None,
            cutoff_nm=self.cutoff_nm,
        )

    # ---- pieces, public so tests and reports can inspect them -------------------------------
    def hardness_matrix(self, region_nm) -> np.ndarray:
        """H (kJ/mol/e^2): J_i on the diagonal, gamma_ij off it."""
        return self._hardness(np.asarray(region_nm, dtype=float))[0]

    def electronegativity(self, region_nm) -> np.ndarray:
        """chi (kJ/mol/e) of the mode at this geometry."""
        h = self.hardness_matrix(region_nm)
        if self.mode == "anchored":
            return -h @ self.anchor_charges
        return self.chi.copy()

    def environment_potential(self, region_nm, box_nm=None, environment_nm=None) -> np.ndarray:
        """phi (kJ/mol/e) at each region atom, switched, by whole molecules."""
        return self._potential(np.asarray(region_nm, dtype=float), box_nm, environment_nm)[0]

    def _hardness(self, x):
        n = len(x)
        i, j = self._iu
        rij = x[i] - x[j]
        r = np.sqrt(np.einsum("pi,pi->p", rij, rij))
        g, dg = shielded_coulomb(r, self._sigma_pairs)
        h = np.diag(self.hardness_diag)
        h[i, j] = g
        h[j, i] = g
        return h, rij, r, dg

    def _group(self, mols):
        """Index arrays for a set of environment molecules, their atoms listed molecule by molecule."""
        mols = np.asarray(mols, dtype=np.int64)
        sizes = self._sizes[mols]
        seg = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(np.int64)
        total = int(sizes.sum())
        first_local = np.repeat(seg, sizes)
        atoms = self._order[np.repeat(self._starts[mols], sizes) + (np.arange(total) - first_local)]
        uniform = int(sizes[0]) if sizes.size and np.all(sizes == sizes[0]) else None
        return dict(mols=mols, atoms=atoms, local_mol=np.repeat(np.arange(mols.size), sizes),
                    first_local=first_local, seg=seg, sizes=sizes.astype(float), uniform=uniform,
                    charges=self.env_charges[atoms])

    @staticmethod
    def _whole_centres(ya, g, box, inv_box):
        """Molecules of group g made whole (each atom imaged next to its molecule's first atom)
        and their geometric centres."""
        if box is not None:
            ref = ya[g["first_local"]]
            ya = ref + _min_image(ya - ref, box, inv_box)
        k = g["uniform"]
        if k is not None:
            per = ya.reshape(-1, k, 3)
            c = per[:, 0].copy()
            for a in range(1, k):
                c += per[:, a]
            return ya, c / k
        return ya, np.add.reduceat(ya, g["seg"], axis=0) / g["sizes"][:, None]

    def _verlet_list(self, y, centre, box, inv_box, w_min):
        """The molecules whose group distance can be below the cutoff until the list is rebuilt,
        each with the lattice shift of every atom that puts the molecule whole at its nearest
        image to the region.

        Built from all molecules (made whole, imaged to the region centre) within
        cutoff + skin. A group distance changes by at most (largest environment-atom
        displacement) + (region-centre displacement) since the build; while that sum stays
        below the skin, no molecule off the list can be inside the cutoff, the listed molecules
        stay whole, and their stored image stays the nearest one for every molecule within the
        cutoff (this needs 2 (cutoff + skin) <= the smallest box width, so the skin is capped at
        half that width minus the cutoff). Past the skin (or when the box changes, or an atom
        was wrapped into the box) the list is rebuilt. Results do not depend on the skin: listed
        molecules outside the cutoff contribute exactly zero.
        """
        lst = self._list
        if lst is not None and lst["box_key"] == self._box_key:
            # |dy| <= sqrt(3) max_k |dy_k|: a cheap, safe bound on the largest displacement
            buf = lst["buf"]
            np.subtract(y, lst["y0"], out=buf)
            np.abs(buf, out=buf)
            moved = math.sqrt(3.0) * float(buf.max())
            moved += float(np.linalg.norm(centre - lst["c0"]))
            if moved < lst["skin"]:
                return lst["group"]
        g = self._all
        ya = y[g["atoms"]]
        whole, centres = self._whole_centres(ya, g, box, inv_box)
        dc = centres - centre
        skin = self.skin_nm
        if box is not None:
            dc_img = _exact_min_image(dc, box, w_min)
            shift = (whole - ya) + (dc_img - dc)[g["local_mol"]]
            dc = dc_img
            skin = max(0.0, min(skin, 0.5 * w_min - self.cutoff_nm))
        else:
            shift = np.zeros_like(ya)
        reach = self.cutoff_nm + skin
        keep = np.nonzero(np.einsum("mi,mi->m", dc, dc) < reach * reach)[0]
        group = self._group(g["mols"][keep])
        at = np.nonzero(np.isin(g["local_mol"], keep))[0]  # g's atoms of the kept molecules, in order
        group["shift"] = shift[at]
        self._list = dict(box_key=self._box_key, y0=y.copy(), c0=centre.copy(), group=group, skin=skin,
                          buf=np.empty_like(y))
        self.list_builds += 1
        return group

    def _potential(self, x, box_nm, env_nm):
        """phi and what the forces need: atom pairs in the cutoff, switch values and derivatives."""
        n = len(x)
        if self.n_env == 0:
            return np.zeros(n), None
        if env_nm is None:
            raise ValueError(
                "the QEq term needs environment_nm (environment positions) when the region "
                "has environment charges"
            )
        y = np.asarray(env_nm, dtype=float)
        if y.shape != (self.n_env, 3):
            raise ValueError(f"environment_nm has shape {y.shape}, expected ({self.n_env}, 3)")
        centre = x.mean(axis=0)
        box = inv_box = w_min = None
        if box_nm is not None:
            box = np.asarray(box_nm, dtype=float).reshape(3, 3)
            key = box.tobytes()
            if key != self._box_key:  # box-derived quantities, recomputed when the box changes
                self._box_key = key
                self._box_cache = (_box_widths(box).min(), np.linalg.inv(box))
            w_min, inv_box = self._box_cache
            if self.cutoff_nm > 0.5 * w_min:
                raise DomainError(
                    f"QEq cutoff_nm={self.cutoff_nm} exceeds half the smallest box width "
                    f"({w_min:.4f} nm); use a larger box or a smaller cutoff_nm."
                )
        else:
            self._box_key = None
        g = self._verlet_list(y, centre, box, inv_box, w_min)
        if g["mols"].size == 0:
            return np.zeros(n), None
        # listed molecules, whole and at their nearest image (shifts from the list build)
        ya, centres = self._whole_centres(y[g["atoms"]] + g["shift"], g, None, None)
        dc = centres - centre
        d2 = np.einsum("mi,mi->m", dc, dc)
        inside = np.nonzero(d2 < self.cutoff_nm * self.cutoff_nm)[0]
        if inside.size == 0:
            return np.zeros(n), None
        d = np.sqrt(d2[inside])
        s, ds = switch(d, self.r_on_nm, self.cutoff_nm)
        pos_in = np.full(g["mols"].size, -1, dtype=np.int64)
        pos_in[inside] = np.arange(inside.size)
        local_all = pos_in[g["local_mol"]]
        sel = np.nonzero(local_all >= 0)[0]
        local_mol = local_all[sel]
        # |x_i - y_a|^2 from the Gram matrix, both relative to the region centre (|.| <~ 1.5 nm,
        # so the cancellation costs < 1e-13 relative); no (n, a, 3) temporaries
        xc = x - centre
        yc = ya[sel]
        yc -= centre
        inv_r = xc @ yc.T
        inv_r *= -2.0
        inv_r += np.einsum("ik,ik->i", xc, xc)[:, None]
        inv_r += np.einsum("ak,ak->a", yc, yc)[None, :]
        np.sqrt(inv_r, out=inv_r)
        np.divide(1.0, inv_r, out=inv_r)
        pot = inv_r * (units.COULOMB_KJMOL_NM * g["charges"][sel])  # (n, a): k q_a / r_ia, unswitched
        s_atom = s[local_mol]
        phi = pot @ s_atom
        aux = dict(
            atoms=g["atoms"][sel], local_mol=local_mol, xc=xc, yc=yc, inv_r=inv_r, pot=pot, s=s,
            ds=ds, s_atom=s_atom, inside=inside, sizes=g["sizes"][inside], dc=dc[inside], d=d,
        )
        return phi, aux

    # ---- the contract ----------------------------------------------------------------------
    def energy_forces(self, region_nm, box_nm=None, environment_nm=None) -> TermResult:
        x = np.asarray(region_nm, dtype=float)
        n = self.region.n_atoms
        if x.shape != (n, 3):
            raise ValueError(f"region_nm has shape {x.shape}; this QEq term was built for ({n}, 3)")
        h, rij, r_ij, dg = self._hardness(x)
        phi, aux = self._potential(x, box_nm, environment_nm)
        if self.mode == "anchored":
            # chi(x) = -H(x) q0 makes q0 the vacuum solution exactly; in the field the charges are
            # q0 + dq with dq the QEq response to phi alone under sum dq = 0
            q_vac = self.anchor_charges
            dq, _ = solve_qeq(phi, h, 0.0)
            q_env = q_vac + dq
            q = np.stack([q_env, q_vac], axis=1)
        else:
            q, _ = solve_qeq(np.stack([self.chi + phi, self.chi], axis=1), h, self.total_charge)
            q_env, q_vac = q[:, 0], q[:, 1]
        # U = L(q_env; phi) - L(q_vac; 0) = 1/2 phi.(q_vac + q_env) by the stationarity conditions
        energy = 0.5 * float(phi @ (q_vac + q_env))

        # hardness part: dU/dr_ij = c_ij gamma'(r_ij) with c_ij the charge products at the optimum
        # (anchored: chi(x) = -H(x) q0 contributes too, giving c_ij = dq_i dq_j)
        i, j = self._iu
        if self.mode == "anchored":
            dq = q_env - q_vac
            c = dq[i] * dq[j]
        else:
            c = q_env[i] * q_env[j] - q_vac[i] * q_vac[j]
        cm = np.zeros((n, n))
        cm[i, j] = -(c * dg) / r_ij
        cm += cm.T
        f_reg = x * cm.sum(axis=1)[:, None] - cm @ x  # sum_j cm_ij (x_i - x_j)
        f_env = np.zeros((self.n_env, 3)) if self.n_env else None

        if aux is not None:
            # E_phi = sum_m S(d_m) sum_i q_i sum_{a in m} k q_a / r_ia
            lm = aux["local_mol"]
            pot = aux["pot"]
            # force on region atom i from env atom a: coef_ia (x_i - y_a),
            # coef_ia = q_i k q_a S_m / r_ia^3
            coef = pot * aux["inv_r"]
            coef *= aux["inv_r"]
            coef *= q_env[:, None]
            coef *= aux["s_atom"][None, :]
            xc, yc = aux["xc"], aux["yc"]
            f_reg += xc * coef.sum(axis=1)[:, None] - coef @ yc
            fa = yc * coef.sum(axis=0)[:, None] - coef.T @ xc
            # the switch: sum_m S'(d_m) V_m grad d_m, d_m = |c_m - c_R|, V_m = sum_i q_i phi_im
            v_m = np.bincount(lm, q_env @ pot, minlength=len(aux["s"]))
            gm = (aux["ds"] * v_m / aux["d"])[:, None] * aux["dc"]  # dE/dc_m
            fa -= (gm / aux["sizes"][:, None])[lm]
            f_reg += gm.sum(axis=0) / n
            f_env[aux["atoms"]] = fa

        dip = np.linalg.norm(q.T @ (x - x.mean(axis=0)), axis=1) * units.E_NM_DEBYE
        extras = {
            "charges": q_env,
            "charges_vacuum": q_vac,
            "dipole_debye": float(dip[0]),
            "dipole_vacuum_debye": float(dip[1]),
            "n_molecules_in_cutoff": 0 if aux is None else int(aux["inside"].size),
        }
        return TermResult(energy=energy, region_forces=f_reg, environment_forces=f_env, extras=extras)

    def describe(self) -> dict[str, Any]:
        d = super().describe()
        d.update(
            mode=self.mode,
            cutoff_nm=self.cutoff_nm,
            switch_width_nm=self.switch_width_nm,
            note="region-environment Coulomb beyond the cutoff is dropped",
        )
        return d


def _in_nm(value):
    """A distance as a plain number in nm; accepts an ``openmm.unit`` Quantity."""
    if hasattr(value, "value_in_unit"):
        import openmm.unit as u

        return value.value_in_unit(u.nanometer)
    return value


def make_term(
    region: RegionInfo,
    *,
    mode: str = "anchored",
    cutoff_nm: float = 1.2,
    switch_width_nm: float = 0.2,
    skin_nm: float = 0.2,
    **unknown,
) -> QEqTerm:
    """Build the QEq layer.

    Parameters
    ----------
    region : RegionInfo
        Needs ``classical_charges`` in the anchored mode and ``environment_charges`` /
        ``environment_molecules`` for any embedding.
    mode : {"anchored", "rappe-goddard"}, default "anchored"
    cutoff_nm : distance, default 1.2 nm
        Group cutoff on the molecule-centre to region-centre distance.
    switch_width_nm : distance, default 0.2 nm
        The switch runs from ``cutoff_nm - switch_width_nm`` to ``cutoff_nm``.
    skin_nm : distance, default 0.2 nm
        Margin of the molecule list (see ``QEqTerm._verlet_list``); affects speed only.
        0 re-examines every environment molecule at every call.

    Raises
    ------
    OptionError
        Unknown option, unknown mode, or a non-positive cutoff / switch width.
    DomainError
        Elements without QEq parameters, or missing / inconsistent classical charges.
    """
    if unknown:
        raise OptionError(
            f"unknown option(s) {sorted(unknown)} for the QEq term; it takes mode=, cutoff_nm=, "
            "switch_width_nm=, skin_nm="
        )
    if mode not in _MODES:
        raise OptionError(f"QEq mode must be one of {list(_MODES)}, got {mode!r}")
    try:
        cutoff_nm = float(_in_nm(cutoff_nm))
        switch_width_nm = float(_in_nm(switch_width_nm))
        skin_nm = float(_in_nm(skin_nm))
    except (TypeError, ValueError) as e:
        raise OptionError(
            f"cutoff_nm, switch_width_nm and skin_nm must be numbers in nm, got {cutoff_nm!r}, "
            f"{switch_width_nm!r}, {skin_nm!r}"
        ) from e
    if not skin_nm >= 0:
        raise OptionError(f"need skin_nm >= 0, got {skin_nm}")
    if not (cutoff_nm > 0 and 0 < switch_width_nm <= cutoff_nm):
        raise OptionError(
            f"need cutoff_nm > 0 and 0 < switch_width_nm <= cutoff_nm, got {cutoff_nm}, {switch_width_nm}"
        )
    return QEqTerm(region, mode, cutoff_nm, switch_width_nm, skin_nm)
