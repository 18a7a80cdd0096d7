"""GFN2-xTB for the region, through tblite, in vacuum.

The region (the ligand) is described by the semi-empirical tight-binding method GFN2-xTB; the
water stays classical and sees the ligand through its fixed AM1-BCC charges and LJ terms
(mechanical embedding, see DESIGN.md section 3). The term evaluates the isolated region:

    U_region = E_GFN2(x_R)        (hartree, converted to kJ/mol)
    F_i      = -dE_GFN2/dx_i      (hartree/bohr, converted to kJ/mol/nm)

The box is ignored (the region is a whole molecule in vacuum; the region force unwraps it).
GFN2-xTB already contains D4 dispersion and its own self-consistent multipole electrostatics, so
no long-range layer is added to it.

Between MD steps the previous converged wavefunction is passed back to tblite
(``Calculator.singlepoint(previous_result)``), which restarts the SCF from it; this typically
saves SCF iterations because consecutive geometries differ little.

===================  ==========  ====================================================
extras key           shape       meaning
===================  ==========  ====================================================
charges              (n_R,)      Mulliken charges of the region atoms, e
scf_time_s           scalar      wall time of tblite's single point (SCF + gradient), s
step                 scalar      number of this call (1-based) since the term was built
===================  ==========  ====================================================

References
----------
C. Bannwarth, S. Ehlert, S. Grimme, J. Chem. Theory Comput. 15, 1652 (2019) (GFN2-xTB;
citation from memory, it matches the one printed in tblite's ``Calculator`` docstring).
tblite: https://github.com/tblite/tblite (Python API ``tblite.interface``).
"""
from __future__ import annotations

import time
from typing import Optional

import numpy as np

from ..errors import DomainError, OptionError, SCFConvergenceError
from ..units import BOHR_NM, BOLTZMANN_KJMOL_K, HARTREE_KJMOL, HARTREE_PER_BOHR_TO_KJMOL_PER_NM
from .base import RegionInfo, RegionTerm, TermContent, TermResult

try:  # optional backend: fail with a message naming the package
    from tblite.exceptions import TBLiteRuntimeError
    from tblite.interface import Calculator, Result
except ImportError as e:  # pragma: no cover - exercised only where tblite is missing
    raise ImportError(
        "the xtb term needs the 'tblite' Python package (pip install tblite); "
        "it provides GFN2-xTB"
    ) from e

__all__ = ["XTBTerm", "make_term", "DEFAULT_OPTIONS", "METHOD"]

#: the tblite method name used by this term
METHOD = "GFN2-xTB"

#: the options make_term accepts, with their defaults
DEFAULT_OPTIONS = {
    "accuracy": 1.0,
    "electronic_temperature_k": 300.0,
    "max_iterations": 250,
}

#: Boltzmann constant in hartree per kelvin, from the CODATA constants in mlbridge.units
#: (tblite takes the electronic temperature in hartree).
BOLTZMANN_HARTREE_K = BOLTZMANN_KJMOL_K / HARTREE_KJMOL

_ELEMENT_SYMBOLS = (
    "H He Li Be B C N O F Ne Na Mg Al Si P S Cl Ar K Ca Sc Ti V Cr Mn Fe Co Ni Cu Zn Ga Ge As Se "
    "Br Kr Rb Sr Y Zr Nb Mo Tc Ru Rh Pd Ag Cd In Sn Sb Te I Xe Cs Ba La Ce Pr Nd Pm Sm Eu Gd Tb "
    "Dy Ho Er Tm Yb Lu Hf Ta W Re Os Ir Pt Au Hg Tl Pb Bi Po At Rn"
).split()

#: GFN2-xTB is parametrized for H..Rn (Z = 1..86)
CONTENT = TermContent(
    reference="GFN2-xTB",
    dispersion="included",
    electrostatics="self-consistent multipole (isolated region)",
    elements=frozenset(_ELEMENT_SYMBOLS),
    net_charges=None,
    cutoff_nm=None,
)


class XTBTerm(RegionTerm):
    """GFN2-xTB energy and forces of the isolated region, with wavefunction reuse.

    Build it with :func:`make_term`. See the module docstring for the physics and the extras.

    Attributes
    ----------
    n_calls : int, how many times :meth:`energy_forces` has been called (the "step" number
        quoted in an SCF failure)
    """

    name = "gfn2"
    content = CONTENT
    uses_environment = False

    def __init__(
        self,
        region: RegionInfo,
        *,
        accuracy: float,
        electronic_temperature_k: float,
        max_iterations: int,
    ):
        self.region = region
        self.numbers = np.asarray(region.atomic_numbers, dtype=np.int32)
        self.net_charge = int(region.net_charge)
        self.accuracy = float(accuracy)
        self.electronic_temperature_k = float(electronic_temperature_k)
        self.max_iterations = int(max_iterations)
        self.n_calls = 0
        self._calc: Optional[Calculator] = None
        self._result: Optional[Result] = None

    # -- wavefunction handling -------------------------------------------------------------
    def reset_wavefunction(self) -> None:
        """Forget the previous wavefunction: the next call starts from tblite's default guess."""
        self._result = None

    def _calculator(self, positions_bohr: np.ndarray) -> Calculator:
        """The tblite calculator, built on the first call and then only moved to new positions."""
        if self._calc is None:
            calc = Calculator(
                METHOD, self.numbers, positions_bohr, charge=float(self.net_charge), uhf=0
            )
            calc.set("verbosity", 0)
            calc.set("accuracy", self.accuracy)
            calc.set("max-iter", self.max_iterations)
            calc.set("temperature", self.electronic_temperature_k * BOLTZMANN_HARTREE_K)
            self._calc = calc
        else:
            self._calc.update(positions_bohr)
        return self._calc

    # -- the contract ----------------------------------------------------------------------
    def energy_forces(
        self,
        region_nm: np.ndarray,
        box_nm: Optional[np.ndarray] = None,
        environment_nm: Optional[np.ndarray] = None,
    ) -> TermResult:
        """GFN2-xTB energy (kJ/mol) and forces (kJ/mol/nm) of the region in vacuum.

        Parameters
        ----------
        region_nm : (n_R, 3) array, nm, whole-molecule coordinates of the region
        box_nm : ignored (the region is treated as an isolated molecule)
        environment_nm : ignored

        Raises
        ------
        SCFConvergenceError
            when tblite's SCF does not converge within ``max_iterations``.
        ValueError
            when the coordinates have the wrong shape or are not finite.
        """
        self.n_calls += 1
        x = np.asarray(region_nm, dtype=float)
        if x.shape != (self.region.n_atoms, 3):
            raise ValueError(
                f"region_nm has shape {x.shape}, expected ({self.region.n_atoms}, 3) for this region"
            )
        if not np.all(np.isfinite(x)):
            raise ValueError(
                f"region coordinates are not finite at step {self.n_calls}; the simulation has "
                "probably blown up (reduce the timestep or minimise first)"
            )
        positions_bohr = np.ascontiguousarray(x / BOHR_NM)
        calc = self._calculator(positions_bohr)
        restart = self._result if self._result is not None else Result()
        t0 = time.perf_counter()
        try:
            res = calc.singlepoint(restart)
        except TBLiteRuntimeError as e:
            self._result = None  # an unconverged density is no guess for the next step
            raise SCFConvergenceError(self._scf_advice(str(e))) from e
        scf_time = time.perf_counter() - t0
        self._result = res

        energy_kj = float(res.get("energy")) * HARTREE_KJMOL
        gradient = np.asarray(res.get("gradient"), dtype=float).reshape(-1, 3)
        forces = -gradient * HARTREE_PER_BOHR_TO_KJMOL_PER_NM
        extras = {
            "charges": np.asarray(res.get("charges"), dtype=float).copy(),
            "scf_time_s": scf_time,
            "step": self.n_calls,
        }
        return TermResult(energy=energy_kj, region_forces=forces, extras=extras)

    def _scf_advice(self, library_message: str) -> str:
        return (
            f"GFN2-xTB SCF of the region failed at step {self.n_calls} (call number of this "
            f"term) with max_iterations={self.max_iterations}, "
            f"electronic_temperature_k={self.electronic_temperature_k:g}: "
            f"tblite says: {library_message!r}. What to try: use a smaller MD timestep (a large "
            "step can produce a distorted geometry); check the geometry (overlapping atoms, "
            "broken bonds, a molecule wrapped across the box that was not made whole); raise "
            "the iteration limit with the option max_iterations=...; or raise the electronic "
            "temperature with electronic_temperature_k=... (e.g. 1000-3000 K for small-gap "
            "systems; it smears the occupations and changes the energy slightly)."
        )

    def describe(self) -> dict:
        d = super().describe()
        d.update(
            accuracy=self.accuracy,
            electronic_temperature_k=self.electronic_temperature_k,
            max_iterations=self.max_iterations,
            embedding="mechanical (vacuum region; water sees fixed classical charges)",
        )
        return d


def _check_domain(region: RegionInfo) -> None:
    bad = sorted({(s, z) for s, z in zip(region.symbols, region.atomic_numbers) if not 1 <= z <= 86})
    if bad:
        raise DomainError(
            f"GFN2-xTB is parametrized for H..Rn (Z = 1-86); the region contains {bad}. "
            "Use a region without these elements or the classical treatment."
        )
    n_electrons = int(sum(region.atomic_numbers)) - int(region.net_charge)
    if n_electrons % 2 != 0:
        raise DomainError(
            f"the region has {n_electrons} electrons (sum of Z {sum(region.atomic_numbers)} "
            f"minus net charge {region.net_charge}): an odd count means an unpaired electron "
            "(a radical or a wrong net charge). An open-shell region needs an unrestricted "
            "calculation (tblite's uhf=1), which this term does not support (it runs closed "
            "shell, uhf=0). Check the ligand's formal charges / protonation state."
        )


def make_term(region: RegionInfo, **options) -> XTBTerm:
    """Build the GFN2-xTB region term.

    Parameters
    ----------
    region : RegionInfo
        elements (Z 1-86) and net charge of the region; the electron count must be even.
    accuracy : float, default 1.0
        tblite's numerical accuracy multiplier (smaller = tighter SCF and integral thresholds).
    electronic_temperature_k : temperature, default 300.0 K
        Fermi smearing temperature of the orbital occupations (converted to hartree for tblite).
    max_iterations : int, default 250
        maximum number of SCF iterations per evaluation.

    Raises
    ------
    OptionError
        for an unknown option (misspelled or meant for another term) or an invalid value.
    DomainError
        for elements beyond Rn or an odd number of electrons.
    """
    unknown = sorted(set(options) - set(DEFAULT_OPTIONS))
    if unknown:
        raise OptionError(
            f"unknown option(s) for the xtb term: {unknown}; the accepted options are "
            f"{sorted(DEFAULT_OPTIONS)}"
        )
    opts = {**DEFAULT_OPTIONS, **options}
    try:
        accuracy = float(opts["accuracy"])
        temperature = float(opts["electronic_temperature_k"])
        max_iterations = opts["max_iterations"]
    except (TypeError, ValueError) as e:
        raise OptionError(f"xtb term options must be numbers, got {options}") from e
    if not (np.isfinite(accuracy) and accuracy > 0):
        raise OptionError(f"accuracy must be a positive number, got {opts['accuracy']!r}")
    if not (np.isfinite(temperature) and temperature > 0):
        raise OptionError(
            f"electronic_temperature_k must be a positive temperature in kelvin, got "
            f"{opts['electronic_temperature_k']!r}"
        )
    if (
        isinstance(max_iterations, bool)
        or not isinstance(max_iterations, (int, np.integer))
        or max_iterations < 1
    ):
        raise OptionError(f"max_iterations must be a positive integer, got {max_iterations!r}")
    _check_domain(region)
    return XTBTerm(
        region,
        accuracy=accuracy,
        electronic_temperature_k=temperature,
        max_iterations=int(max_iterations),
    )
