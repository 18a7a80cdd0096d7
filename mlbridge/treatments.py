"""The registry of treatments: which region terms a built system gets (DESIGN.md section 4).

A treatment is data. Adding one is adding an entry to :data:`TREATMENTS`.

=============  =================  ============  ===================================
name           region potential   layer         region-water Coulomb
=============  =================  ============  ===================================
classical      GAFF2/AM1-BCC      none          fixed AM1-BCC charges, PME
ml             ANI (ani1x)        none          fixed AM1-BCC charges, PME
ml+d3          ANI                D3(BJ)        fixed AM1-BCC charges, PME
ml+d3+qeq      ANI                D3(BJ) + QEq  QEq embedding (region charges zeroed)
xtb            GFN2-xTB           none          fixed AM1-BCC charges, PME
=============  =================  ============  ===================================
"""
from __future__ import annotations

from dataclasses import dataclass

from .errors import TreatmentError


@dataclass(frozen=True)
class Treatment:
    """One way of treating the region.

    Attributes
    ----------
    name : str
    terms : tuple of str, term modules in :mod:`mlbridge.terms`, in force-group order
    replaces_region_coulomb : bool, region charges are zeroed in the NonbondedForce (QEq)
    uses_ml : bool, the first term is the ML potential chosen by ``model=``
    summary : str, one line for reports
    """

    name: str
    terms: tuple
    replaces_region_coulomb: bool = False
    uses_ml: bool = False
    summary: str = ""


TREATMENTS = {t.name: t for t in (
    Treatment("classical", (), summary="GAFF2/AM1-BCC everywhere (reference MM)"),
    Treatment("ml", ("ani",), uses_ml=True,
              summary="ANI on the ligand, mechanical embedding (fixed AM1-BCC charges to water)"),
    Treatment("ml+d3", ("ani", "d3"), uses_ml=True,
              summary="ANI + D3(BJ) dispersion inside the ligand, mechanical embedding"),
    Treatment("ml+d3+qeq", ("ani", "d3", "qeq"), replaces_region_coulomb=True, uses_ml=True,
              summary="ANI + D3(BJ) + QEq charges polarised by the water (replaces fixed-charge Coulomb)"),
    Treatment("xtb", ("xtb",), summary="GFN2-xTB on the ligand in vacuum, mechanical embedding"),
)}


def get_treatment(name: str) -> Treatment:
    """Look a treatment up by name; an unknown name lists the known ones."""
    try:
        return TREATMENTS[name]
    except KeyError:
        raise TreatmentError(
            f"unknown treatment {name!r}; choose one of: {', '.join(TREATMENTS)}"
        ) from None
