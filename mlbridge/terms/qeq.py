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
    t = np.array(d_nm, dtype=float, ndmin=1)  # a new array: everything below is in place
    t -= r_on_nm
    w = r_cut_nm - r_on_nm
    t *= 1.0 / w
    np.clip(t, 0.0, 1.0, out=t)
    s = t * 6.0
    s -= 15.0
    s *= t
    s += 10.0
    s *= t
    s *= t
    s *= t  # 10t^3 - 15t^4 + 6t^5
    np.subtract(1.0, s, out=s)
    ds = 1.0 - t
    ds *= t
    np.square(ds, out=ds)
    ds *= -30.0 / w  # -30 t^2 (1 - t)^2 / w
    if np.ndim(d_nm) == 0:
        return float(s[0]), float(ds[0])
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


_XYZ = np.arange(3)
_ONES3 = np.ones(3)

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
        self._mean_weights = np.full(n, 1.0 / n)
        self._inv_sigma = 1.0 / self._sigma
        self._eye = np.eye(n)
        self._off = 1.0 - self._eye  # zero on the diagonal
        self._j_diag = np.diag(self.hardness_diag)
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
        return self._hardness(self._centred(np.asarray(region_nm, dtype=float))[1])[0]

    def electronegativity(self, region_nm) -> np.ndarray:
        """chi (kJ/mol/e) of the mode at this geometry."""
        h = self.hardness_matrix(region_nm)
        if self.mode == "anchored":
            return -h @ self.anchor_charges
        return self.chi.copy()

    def environment_potential(self, region_nm, box_nm=None, environment_nm=None) -> np.ndarray:
        """phi (kJ/mol/e) at each region atom, switched, by whole molecules."""
        x = np.asarray(region_nm, dtype=float)
        return self._potential(*self._centred(x), box_nm, environment_nm)[0]

    def _centred(self, x):
        """The region's geometric centre and its coordinates relative to it."""
        centre = self._mean_weights @ x
        return centre, x - centre

    def _hardness(self, xc):
        """H (n, n) and gamma'(r_ij)/r_ij (n, n, zero on the diagonal), as full matrices, from
        centred coordinates xc (|x|^2 + |x'|^2 - 2 x.x' then loses < 1e-13 relative).

        gamma' = k_e [2/sqrt(pi) exp(-u^2) / (sigma r) - erf(u) / r^2], u = r/sigma.
        """
        xx = np.square(xc) @ _ONES3
        r = xc @ xc.T
        r *= -2.0
        r += xx
        r += xx[:, None]
        r += self._eye  # r_ii = 1: finite everywhere, the diagonal is replaced below
        np.maximum(r, 0.0, out=r)
        np.sqrt(r, out=r)
        inv_r = 1.0 / r
        u = r * self._inv_sigma
        e = erf(u)
        e *= inv_r  # erf(u)/r
        np.square(u, out=u)
        np.negative(u, out=u)
        np.exp(u, out=u)
        u *= self._inv_sigma
        u *= _TWO_OVER_SQRT_PI
        u -= e  # [2/sqrt(pi) exp(-u^2)/sigma - erf(u)/r] = r gamma'/k_e
        u *= inv_r
        u *= inv_r
        u *= units.COULOMB_KJMOL_NM * self._off  # gamma'/r, zero diagonal
        e *= units.COULOMB_KJMOL_NM * self._off
        e += self._j_diag  # H
        return e, u

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
                    kq=units.COULOMB_KJMOL_NM * self.env_charges[atoms],
                    flat_atoms=(3 * atoms[:, None] + _XYZ).ravel(),
                    flat_rows=(3 * np.arange(total)[:, None] + _XYZ),
                    average=(np.tile(np.eye(3), (uniform, 1)) / uniform) if uniform else None,
                    inv_sizes=(1.0 / sizes)[:, None] if sizes.size else np.zeros((0, 1)))

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
            dcen = centre - lst["c0"]
            moved += math.sqrt(float(dcen @ dcen))
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

    def _potential(self, centre, xc, box_nm, env_nm):
        """phi and what the forces need (see energy_forces), or (zeros, None) with nothing in reach.

        Every listed molecule takes part; those at or beyond the cutoff have S = S' = 0 and
        contribute exactly zero (cheaper than selecting the ones inside at every call).
        """
        n = len(xc)
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
        # listed atoms, whole and at their nearest image (shifts from the list build), relative
        # to the region centre (|.| <~ 1.5 nm), and their molecules' centres
        yc = y.take(g["atoms"], axis=0)
        yc += g["shift"]
        yc -= centre
        k = g["uniform"]
        if k is not None:  # (m, 3k) @ (3k, 3): the mean of each molecule's k atoms
            dc = yc.reshape(-1, 3 * k) @ g["average"]
        else:
            dc = np.add.reduceat(yc, g["seg"], axis=0)
            dc *= g["inv_sizes"]
        d = np.sqrt(np.square(dc) @ _ONES3)
        s, ds = switch(d, self.r_on_nm, self.cutoff_nm)
        w = s.take(g["local_mol"])
        w *= g["kq"]  # w_a = k_e q_a S(d_m(a))
        # only the charged atoms of molecules inside the cutoff: the others have w_a = 0 and
        # add exactly nothing to phi or to any force but the switch's (handled by molecule)
        sel = np.flatnonzero(w)
        if sel.size == 0:  # nothing charged inside the cutoff
            return np.zeros(n), None
        w = w.take(sel)
        yc = yc.take(sel, axis=0)
        # |x_i - y_a|^2 in one product: [x, |x|^2, 1] . [-2 y, 1, |y|^2] (no (n, a, 3) temporaries;
        # relative to the region centre the cancellation costs < 1e-13 relative)
        xa = np.empty((n, 5))
        xa[:, :3] = xc
        xa[:, 3] = np.square(xc) @ _ONES3
        xa[:, 4] = 1.0
        ya = np.empty((5, len(yc)))
        np.multiply(yc.T, -2.0, out=ya[:3])
        ya[3] = 1.0
        ya[4] = np.square(yc) @ _ONES3
        inv_r = xa @ ya
        np.sqrt(inv_r, out=inv_r)
        np.divide(1.0, inv_r, out=inv_r)  # (n, a): 1/r_ia
        phi = inv_r @ w
        aux = dict(g=g, sel=sel, yc=yc, inv_r=inv_r, w=w, s=s, ds=ds, d=d, dc=dc)
        return phi, aux

    # ---- the contract ----------------------------------------------------------------------
    def energy_forces(self, region_nm, box_nm=None, environment_nm=None) -> TermResult:
        x = np.asarray(region_nm, dtype=float)
        n = self.region.n_atoms
        if x.shape != (n, 3):
            raise ValueError(f"region_nm has shape {x.shape}; this QEq term was built for ({n}, 3)")
        centre, xc = self._centred(x)
        h, dg_r = self._hardness(xc)
        phi, aux = self._potential(centre, xc, box_nm, environment_nm)
        if self.mode == "anchored":
            # chi(x) = -H(x) q0 makes q0 the vacuum solution exactly; in the field the charges are
            # q0 + dq with dq the QEq response to phi alone under sum dq = 0
            q_vac = self.anchor_charges
            dq, _ = solve_qeq(phi, h, 0.0)
            q_env = q_vac + dq
            energy = float(phi @ q_vac) + 0.5 * float(phi @ dq)
            c = np.multiply.outer(dq, dq)
        else:
            q, _ = solve_qeq(np.stack([self.chi + phi, self.chi], axis=1), h, self.total_charge)
            q_env, q_vac = q[:, 0], q[:, 1]
            energy = 0.5 * float(phi @ (q_vac + q_env))
            c = np.multiply.outer(q_env, q_env)
            c -= np.multiply.outer(q_vac, q_vac)
        # U = L(q_env; phi) - L(q_vac; 0) = 1/2 phi.(q_vac + q_env) by the stationarity conditions.
        # Hardness part: dU/dr_ij = c_ij gamma'(r_ij) with c_ij the charge products at the optimum
        # (anchored: chi(x) = -H(x) q0 contributes too, giving c_ij = dq_i dq_j); with
        # cm_ij = -c_ij gamma'_ij / r_ij the force is sum_j cm_ij (x_i - x_j)
        c *= dg_r
        np.negative(c, out=c)
        f_reg = x * c.sum(axis=1)[:, None]
        f_reg -= c @ x
        f_env = None
        n_inside = 0
        if self.n_env:
            f_env = np.zeros((self.n_env, 3))
        if aux is not None:
            # E_phi = sum_i q_i phi_i, phi_i = sum_a w_a / r_ia, w_a = k_e q_a S_m(a):
            # force on region atom i:  q_i sum_a w_a (x_i - y_a) / r_ia^3
            # force on environment a:  w_a sum_i q_i (y_a - x_i) / r_ia^3
            g, yc, inv_r, w = aux["g"], aux["yc"], aux["inv_r"], aux["w"]
            b3 = inv_r * inv_r
            b3 *= inv_r
            fr = xc * (b3 @ w)[:, None]
            fr -= b3 @ (yc * w[:, None])
            fr *= q_env[:, None]
            f_reg += fr
            fa = yc * (q_env @ b3)[:, None]
            fa -= b3.T @ (xc * q_env[:, None])
            fa *= w[:, None]
            # the switch: sum_m S'(d_m) V_m grad d_m, d_m = |c_m - c_R|, V_m = sum_i q_i phi_im
            # (unswitched potential of molecule m at i); S' = 0 off the switching shell
            ds, d, sel = aux["ds"], aux["d"], aux["sel"]
            u = q_env @ inv_r
            u *= g["kq"].take(sel)
            v_m = np.bincount(g["local_mol"].take(sel), u, minlength=len(d))
            v_m *= ds
            np.divide(v_m, d, out=v_m, where=d > 0)  # S' V_m / d_m (S' = 0 where d_m = 0)
            f_reg += (v_m @ aux["dc"]) / n  # sum_m dE/dc_m, dE/dc_m = v_m dc_m
            v_m *= g["inv_sizes"][:, 0]
            np.negative(v_m, out=v_m)  # each atom of molecule m (charged or not) gets -dE/dc_m / n_m
            f_all = aux["dc"].take(g["local_mol"], axis=0)
            f_all *= v_m.take(g["local_mol"])[:, None]
            flat_sel = g["flat_rows"].take(sel, axis=0).ravel()  # 1-D fancy indexing: ~3x faster than rows
            f_all.reshape(-1)[flat_sel] += fa.reshape(-1)
            f_env.reshape(-1)[g["flat_atoms"]] = f_all.reshape(-1)
            n_inside = int(np.count_nonzero(aux["s"]))

        dip_env = q_env @ xc
        dip_vac = q_vac @ xc
        extras = {
            "charges": q_env,
            "charges_vacuum": q_vac,
            "dipole_debye": math.sqrt(float(dip_env @ dip_env)) * units.E_NM_DEBYE,
            "dipole_vacuum_debye": math.sqrt(float(dip_vac @ dip_vac)) * units.E_NM_DEBYE,
            "n_molecules_in_cutoff": n_inside,
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
