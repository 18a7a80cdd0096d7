"""Unit conversion constants: one place, one source.

Inside mlbridge everything is in OpenMM's units (nm, ps, kJ/mol, elementary charge). The
constants below convert at the edges of libraries that use atomic units (dftd3, tblite: bohr,
hartree) or angstrom/hartree (torchani).

Sources: CODATA 2018 (Tiesinga et al., Rev. Mod. Phys. 93, 025010 (2021)) for the Bohr radius,
the Hartree energy, the Avogadro and Boltzmann constants; the Coulomb constant is the value
OpenMM uses internally (ONE_4PI_EPS0 in openmm/reference/SimTKOpenMMRealType.h).
"""

#: Bohr radius in nm (CODATA 2018: 0.529177210903 angstrom).
BOHR_NM = 0.0529177210903
#: nm per angstrom.
ANGSTROM_NM = 0.1
#: Avogadro constant, 1/mol (CODATA 2018, exact).
AVOGADRO = 6.02214076e23
#: Hartree energy in kJ/mol (CODATA 2018: 4.3597447222071e-18 J times N_A).
HARTREE_KJMOL = 4.3597447222071e-18 * AVOGADRO / 1000.0
#: kcal in kJ (thermochemical calorie, exact).
KCAL_KJ = 4.184
#: Boltzmann constant in kJ/mol/K (CODATA 2018, exact: 1.380649e-23 J/K times N_A).
BOLTZMANN_KJMOL_K = 1.380649e-23 * AVOGADRO / 1000.0
#: Coulomb constant 1/(4 pi eps0) in kJ mol^-1 nm e^-2 (OpenMM's ONE_4PI_EPS0).
COULOMB_KJMOL_NM = 138.935456
#: elementary charge times nm in debye (1 D = 3.33564e-30 C m; e*nm = 1.602176634e-28 C m).
E_NM_DEBYE = 1.602176634e-28 / 3.33564095198e-30

#: Energy and force conversions used at library edges.
HARTREE_PER_BOHR_TO_KJMOL_PER_NM = HARTREE_KJMOL / BOHR_NM
HARTREE_PER_ANGSTROM_TO_KJMOL_PER_NM = HARTREE_KJMOL / ANGSTROM_NM


def kT_kjmol(temperature_k: float) -> float:
    """Thermal energy k_B T in kJ/mol at `temperature_k` kelvin."""
    return BOLTZMANN_KJMOL_K * float(temperature_k)
