r"""D3(BJ) dispersion inside the region, through the ``dftd3`` package (s-dftd3's Python API).

The two-body energy with rational (Becke-Johnson) damping is

.. math::

    E_\mathrm{D3} = -\sum_{i<j \in R} \sum_{n=6,8} s_n
        \frac{C_n^{ij}(\mathrm{CN}_i, \mathrm{CN}_j)}{r_{ij}^n + (a_1 R_0^{ij} + a_2)^n},
    \qquad R_0^{ij} = \sqrt{C_8^{ij} / C_6^{ij}}

with coordination-number dependent :math:`C_6` from Grimme's reference table and
:math:`C_8 = 3 C_6 \sqrt{Q_i Q_j}`. The optional three-body Axilrod-Teller-Muto term is scaled
by ``s9`` (zero-damped, ``alp = 14``); it is OFF unless ``atm=True`` is asked for.

Only region-internal pairs enter (region-water dispersion is already in the classical
Lennard-Jones terms), so the region is evaluated as a molecule in vacuum.

==================  =====================================================================
symbol              unit
==================  =====================================================================
r_ij, a2, R0        bohr inside dftd3 (nm at this module's boundary)
C6, C8              hartree bohr^6, hartree bohr^8
s6, s8, s9, a1      dimensionless
E                   hartree inside dftd3 (kJ/mol at this module's boundary)
==================  =====================================================================

Parameter presets
-----------------
``wb97x`` (the default, for ANI-1x/ANI-2x whose reference ωB97X/6-31G(d) has no dispersion):
s6 = 1, s8 = 0.2641, a1 = 0.0, a2 = 5.4959 bohr; these are held here explicitly. They agree with
what s-dftd3 1.7.0 loads for ``method="wb97x"`` (checked: identical energies to 1e-15 hartree
in ``tests/test_d3.py``). Any other name (``pbe0``, ``b3lyp``, ...) is loaded from the s-dftd3
parameter table.

About ATM and the ``dftd3`` API: ``RationalDampingParam(s8=..., a1=..., a2=...)`` defaults to
``s9 = 1`` (ATM on), and older releases of the package also loaded methods with ATM on. This
module therefore always passes ``atm`` / ``s9`` explicitly; the default is s9 = 0.

References
----------
- S. Grimme, J. Antony, S. Ehrlich, H. Krieg, J. Chem. Phys. 132, 154104 (2010) (DFT-D3).
- S. Grimme, S. Ehrlich, L. Goerigk, J. Comput. Chem. 32, 1456 (2011) (BJ damping).
- ωB97X BJ parameters: F. Najibi, L. Goerigk, J. Chem. Theory Comput. 14, 5725 (2018)
  (citation from memory; the values are those of the s-dftd3 parameter table).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping, Optional, Union

import numpy as np

from .. import units
from ..errors import OptionError, TreatmentError
from .base import RegionInfo, RegionTerm, TermContent, TermResult

try:
    from dftd3.interface import DispersionModel, RationalDampingParam
except ImportError as e:  # pragma: no cover - dftd3 is a hard dependency of mlbridge
    raise ImportError(
        "mlbridge.terms.d3 needs the 'dftd3' package (the Python API of s-dftd3): "
        "pip install dftd3"
    ) from e

__all__ = ["D3BJParams", "D3Term", "make_term", "require_missing_dispersion"]

#: Presets held in this module (the values, not only the name, are part of our contract).
_LOCAL_PRESETS = {
    # ωB97X-D3(BJ): s-dftd3 parameter table; Najibi & Goerigk, JCTC 14, 5725 (2018), from memory.
    "wb97x": {"s6": 1.0, "s8": 0.2641, "a1": 0.0, "a2": 5.4959},
}

#: Element symbols Z = 1..94, the range of the D3 reference C6 table (Grimme et al. 2010).
_SYMBOLS = (
    "H He Li Be B C N O F Ne Na Mg Al Si P S Cl Ar K Ca Sc Ti V Cr Mn Fe Co Ni Cu Zn Ga Ge As "
    "Se Br Kr Rb Sr Y Zr Nb Mo Tc Ru Rh Pd Ag Cd In Sn Sb Te I Xe Cs Ba La Ce Pr Nd Pm Sm Eu Gd "
    "Tb Dy Ho Er Tm Yb Lu Hf Ta W Re Os Ir Pt Au Hg Tl Pb Bi Po At Rn Fr Ra Ac Th Pa U Np Pu"
).split()
D3_ELEMENTS = frozenset(_SYMBOLS)

_EXPLICIT_KEYS = ("s6", "s8", "a1", "a2", "s9")


@dataclass(frozen=True)
class D3BJParams:
    """Immutable D3(BJ) damping parameters: a named preset OR explicit values, never a mix.

    Build with :meth:`from_functional` or :meth:`from_values`, not with the constructor.

    Attributes
    ----------
    label : str
        Preset name ("wb97x", "pbe0", ...) or "custom" for explicit values.
    s6, s8, a1 : float or None, dimensionless
        None for presets loaded from the s-dftd3 table (the library holds the numbers).
    a2 : float or None, bohr
    s9 : float, dimensionless
        Scale of the three-body ATM term; 0.0 = off (our default).
    from_table : bool
        Whether the two-body values come from the s-dftd3 parameter table by ``label``.
    """

    label: str
    s6: Optional[float]
    s8: Optional[float]
    a1: Optional[float]
    a2: Optional[float]
    s9: float
    from_table: bool

    @classmethod
    def from_functional(cls, functional: str = "wb97x", *, atm: bool = False) -> "D3BJParams":
        """Preset for a density functional; ATM (s9 = 1) only with ``atm=True``."""
        if not isinstance(functional, str) or not functional.strip():
            raise OptionError(f"functional must be a functional name such as 'wb97x', got {functional!r}")
        name = functional.strip().lower()
        s9 = 1.0 if atm else 0.0
        if name in _LOCAL_PRESETS:
            p = _LOCAL_PRESETS[name]
            return cls(label=name, s9=s9, from_table=False, **p)
        params = cls(label=name, s6=None, s8=None, a1=None, a2=None, s9=s9, from_table=True)
        params.damping()  # fail now, not at the first MD step, for a name the table lacks
        return params

    @classmethod
    def from_values(
        cls, *, s8: float, a1: float, a2: float, s6: float = 1.0, s9: float = 0.0
    ) -> "D3BJParams":
        """Explicit values (keyword-only): s6, s8, a1 dimensionless; a2 in bohr; s9 = 0 is ATM off."""
        vals = {"s6": s6, "s8": s8, "a1": a1, "a2": a2, "s9": s9}
        for k, v in vals.items():
            try:
                vals[k] = float(v)
            except (TypeError, ValueError) as e:
                raise OptionError(f"D3(BJ) parameter {k} must be a number, got {v!r}") from e
            if not np.isfinite(vals[k]):
                raise OptionError(f"D3(BJ) parameter {k} must be finite, got {v!r}")
        return cls(label="custom", from_table=False, **vals)

    @property
    def atm(self) -> bool:
        return self.s9 != 0.0

    def damping(self) -> RationalDampingParam:
        """A fresh ``dftd3.interface.RationalDampingParam`` for these parameters."""
        if self.from_table:
            try:
                return RationalDampingParam(method=self.label, atm=self.atm)
            except Exception as e:  # dftd3 raises RuntimeError for unknown methods
                raise OptionError(
                    f"s-dftd3 has no D3(BJ) parameters for functional {self.label!r}: {e}. "
                    "Use a name from its table (e.g. 'pbe0', 'b3lyp') or explicit values "
                    "params={'s6': ..., 's8': ..., 'a1': ..., 'a2': ...}."
                ) from e
        return RationalDampingParam(s6=self.s6, s8=self.s8, s9=self.s9, a1=self.a1, a2=self.a2)

    def describe(self) -> dict[str, Any]:
        d = {"label": self.label, "s9": self.s9, "atm": self.atm}
        if self.from_table:
            d["source"] = "s-dftd3 parameter table"
        else:
            d.update(s6=self.s6, s8=self.s8, a1=self.a1, a2_bohr=self.a2)
        return d


def _make_params(functional: str, params: Union[None, D3BJParams, Mapping], atm: bool) -> D3BJParams:
    if params is None:
        return D3BJParams.from_functional(functional, atm=atm)
    if functional != "wb97x" or atm:
        raise OptionError(
            f"give either functional=/atm= (a preset) or params= (explicit values), not both: "
            f"got functional={functional!r}, atm={atm!r} and params={params!r}. "
            "With explicit values set the three-body term with params['s9']."
        )
    if isinstance(params, D3BJParams):
        return params
    if isinstance(params, Mapping):
        unknown = sorted(set(params) - set(_EXPLICIT_KEYS))
        if unknown:
            raise OptionError(
                f"unknown D3(BJ) parameter(s) {unknown}; explicit params take {list(_EXPLICIT_KEYS)}"
            )
        missing = sorted({"s8", "a1", "a2"} - set(params))
        if missing:
            raise OptionError(f"explicit D3(BJ) params need {missing} as well (got {dict(params)})")
        return D3BJParams.from_values(**params)
    raise OptionError(f"params must be None, a dict of s6/s8/a1/a2/s9 or a D3BJParams, got {params!r}")


class D3Term(RegionTerm):
    """Region-internal D3(BJ) dispersion (see the module docstring for the equation).

    ``energy_forces(region_nm)`` returns the energy in kJ/mol and forces in kJ/mol/nm; the
    ``dftd3`` model is built on the first call and only its positions are updated afterwards.
    """

    name = "d3bj"
    uses_environment = False

    def __init__(self, region: RegionInfo, params: D3BJParams):
        self.region = region
        self.params = params
        self._numbers = np.asarray(region.atomic_numbers, dtype=np.int32)
        self._damping = params.damping()
        self._model: Optional[DispersionModel] = None
        self.content = TermContent(
            reference="D3(BJ)",
            dispersion="included",
            electrostatics="none",
            elements=D3_ELEMENTS,
            net_charges=None,
            cutoff_nm=None,
        )

    def energy_forces(self, region_nm, box_nm=None, environment_nm=None) -> TermResult:
        x = np.asarray(region_nm, dtype=float)
        if x.shape != (len(self._numbers), 3):
            raise ValueError(
                f"region_nm has shape {x.shape}; this D3 term was built for "
                f"({len(self._numbers)}, 3)"
            )
        bohr = x / units.BOHR_NM
        if self._model is None:
            self._model = DispersionModel(self._numbers, bohr)
        else:
            self._model.update(bohr)
        res = self._model.get_dispersion(self._damping, grad=True)
        energy = float(res["energy"]) * units.HARTREE_KJMOL
        forces = -np.asarray(res["gradient"], dtype=float) * units.HARTREE_PER_BOHR_TO_KJMOL_PER_NM
        return TermResult(energy=energy, region_forces=forces, extras={})

    def describe(self) -> dict[str, Any]:
        d = super().describe()
        d["params"] = self.params.describe()
        return d


def make_term(
    region: RegionInfo,
    *,
    functional: str = "wb97x",
    params: Union[None, D3BJParams, Mapping] = None,
    atm: bool = False,
    **unknown,
) -> D3Term:
    """Build the region's D3(BJ) term.

    Parameters
    ----------
    region : RegionInfo
    functional : str, default "wb97x"
        Parameter preset; "wb97x" is held here, other names come from the s-dftd3 table.
    params : dict or D3BJParams, optional
        Explicit values ``{"s6", "s8", "a1", "a2" (bohr), "s9"}`` instead of a preset; cannot be
        combined with a non-default ``functional`` or with ``atm``.
    atm : bool, default False
        Add the three-body Axilrod-Teller-Muto term (s9 = 1) to a preset.

    Raises
    ------
    OptionError
        For unknown options, a preset mixed with explicit values, or an unknown functional.
    DomainError
        Never here: D3 covers Z = 1..94, so the ML potential's domain is the binding one.
    """
    if unknown:
        raise OptionError(
            f"unknown option(s) {sorted(unknown)} for the D3 term; it takes functional=, params=, atm="
        )
    if not isinstance(atm, (bool, np.bool_)):
        raise OptionError(f"atm must be True or False, got {atm!r}")
    return D3Term(region, _make_params(functional, params, bool(atm)))


def require_missing_dispersion(content: TermContent, potential_name: str) -> None:
    """Refuse to add D3 to a potential that already contains dispersion.

    Raises
    ------
    TreatmentError
        When ``content.dispersion == "included"`` (e.g. ANI-1ccx, trained towards CCSD(T)/CBS).
    """
    if content.dispersion == "none":
        return
    if content.dispersion != "included":
        raise TreatmentError(
            f"{potential_name} declares dispersion={content.dispersion!r}; expected 'none' or 'included'"
        )
    raise TreatmentError(
        f"{potential_name} already includes dispersion: its reference ({content.reference}) "
        "contains the dispersion energy, so adding D3(BJ) on top would count dispersion twice. "
        f"Use the treatment 'ml' with {potential_name} (no D3 layer), or a potential without "
        "dispersion such as ani1x with 'ml+d3'."
    )
