"""The comparison of treatments end to end (on very short runs), its report, skips and refusals.

Run lengths here are far too short to judge drift or sampling: the tests check that every number
is produced, finite and in its place, and the invariants that hold at any length (the reference's
force difference is zero; every treatment saw the same start structure and the same sites).
"""
import json
import re
import math

import numpy as np
import openmm
import pytest

from mlbridge import cli
from mlbridge import compare as compare_module
from mlbridge.compare import NOT_COMPARABLE, compare, force_differences
from mlbridge.errors import OptionError, TreatmentError

#: short settings: 10 NVT frames, 11 NVE energy samples, 50 minimiser iterations. One thread: on a loaded 2-core machine
#: torch and OpenMM threads compete inside the PythonForce callback (2 threads measured ~30x
#: slower there than 1).
SHORT = dict(run_ps=0.1, equilibration_ps=0.05, nve_ps=0.1, report_interval=10, sample_interval_steps=10,
             threads=1, progress=False, minimize_max_iterations=50)
TINY = dict(run_ps=0.02, equilibration_ps=0.01, nve_ps=0.03, report_interval=3, sample_interval_steps=10,
            threads=1, progress=False, minimize_max_iterations=50)
PNGS = ("energy.png", "torsions.png", "rdf.png", "speed.png")
TREATED = ["classical", "ml", "xtb"]


def _finite(x) -> bool:
    return isinstance(x, (int, float)) and math.isfinite(x)


@pytest.fixture(scope="module")
def comparison(solvated, tmp_path_factory):
    out = tmp_path_factory.mktemp("compare") / "cmp"
    folder = compare(solvated, treatments=TREATED, out=out, **SHORT)
    return folder, json.loads((folder / "comparison.json").read_text()), (folder / "comparison.md").read_text()


def test_every_treatment_has_its_numbers(comparison, solvated):
    folder, data, _md = comparison
    assert list(data["treatments"]) == TREATED
    n_torsions = len(data["sites"]["torsions"])
    assert n_torsions == 2  # acetaminophen: the aryl-N bond and the phenol O-H rotor
    for name, t in data["treatments"].items():
        assert t["status"] == "ok", (name, t["reason"])
        c = t["check"]
        for key in ("ms_per_step", "ns_per_day", "classical_ms_per_step", "drift_kT_per_ns_per_dof",
                    "drift_kjmol_per_ns", "bridge_overhead_ms"):
            assert _finite(c[key]), (name, key, c[key])
        assert c["ms_per_step"] > 0
        assert c["drift_status"] in ("pass", "drifts", "unresolved")
        sp = t["single_point"]
        assert _finite(sp["force_rms_diff_kjmol_nm"]) and _finite(sp["force_max_diff_kjmol_nm"])
        assert sp["force_max_diff_kjmol_nm"] >= sp["force_rms_diff_kjmol_nm"] >= 0
        assert np.asarray(sp["region_forces_kjmol_nm"]).shape == (len(solvated.region), 3)
        assert [g["group"] for g in sp["energy_groups"]][0] == 0
        run = t["run"]
        assert run["n_frames"] == 10  # 100 steps / 10
        assert len(run["torsions"]) == n_torsions
        for tor in run["torsions"]:
            dens, edges = np.asarray(tor["histogram_density_per_deg"]), np.asarray(tor["histogram_edges_deg"])
            assert np.sum(dens * np.diff(edges)) == pytest.approx(1.0)  # normalised
        assert len(run["rdf"]) == 4  # O1, N1, O2 and all of them together
        for rdf in run["rdf"]:
            assert rdf["r_max_nm"] <= 1.0 and np.all(np.isfinite(rdf["g"]))
        assert _finite(run["hbonds"]["total_mean"]) and run["hbonds"]["total_mean"] >= 0
        assert 0 <= run["rmsd"]["mean_nm"] <= run["rmsd"]["max_nm"] < 0.2
        assert _finite(run["energy"]["potential_std_kjmol"])
        assert abs(np.mean(run["energy"]["potential_minus_mean_kjmol"])) < 1e-6 * max(1.0, run["energy"]["potential_std_kjmol"])
    ref = data["treatments"]["classical"]["single_point"]
    assert ref["force_rms_diff_kjmol_nm"] == 0.0 and ref["force_max_diff_kjmol_nm"] == 0.0
    # a region potential other than GAFF2 changes the forces on the region atoms
    assert data["treatments"]["ml"]["single_point"]["force_rms_diff_kjmol_nm"] > 1.0
    # ANI gives its ensemble spread; the terms are timed
    ml = data["treatments"]["ml"]["check"]
    assert _finite(ml["ensemble_std_kjmol_mean"]) and ml["ensemble_std_kjmol_mean"] > 0
    assert set(ml["region_terms_ms"]) == {"ani1x"}
    assert "qeq_dipole_debye_mean" not in data["treatments"]["xtb"]["check"]
    for png in PNGS:
        assert (folder / png).stat().st_size > 1000, png
    assert not any(p.name.startswith(".") for p in folder.parent.iterdir())  # no temporary left


def test_report_states_what_it_compares(comparison):
    _folder, data, md = comparison
    assert NOT_COMPARABLE in md and data["not_comparable"] == NOT_COMPARABLE
    assert "not comparable" in md
    for name in TREATED:
        assert f"`{name}`" in md
    header = next(line for line in md.splitlines() if line.startswith("| quantity |"))
    assert header.count("|") == len(TREATED) + 2  # one column per treatment
    for row in ("drift ± 2σ (kT/ns/DOF)", "ms/step", "ns/day", "bridge overhead", "force RMS diff",
                "force max diff", "RMSD", "H-bonds", "ANI ensemble spread", "QEq dipole"):
        assert row in md, row
    for png in PNGS:
        assert f"]({png})" in md
    # every warning of every treatment is gathered before the table
    warnings = data["warnings"]
    assert warnings == [w for t in data["treatments"].values() for w in t.get("check", {}).get("warnings", [])]
    top = md.split("| quantity |")[0]
    for w in warnings:
        assert w in top


def test_force_differences_are_per_atom_norms():
    ref = np.zeros((3, 3))
    f = np.array([[3.0, 4.0, 0.0], [0.0, 0.0, 0.0], [0.0, 0.0, 12.0]])  # norms 5, 0, 12
    d = force_differences(f, ref)
    assert d["force_max_diff_kjmol_nm"] == 12.0
    assert d["force_rms_diff_kjmol_nm"] == pytest.approx(math.sqrt((25 + 144) / 3))


def test_treatment_that_cannot_be_built_is_skipped_with_reason(solvated, tmp_path, monkeypatch):
    """ANI-1ccx already contains dispersion: ml+d3 with it is refused at build time, and the
    comparison reports it as skipped (with the reason) instead of stopping. A treatment whose run
    blows up (here: ml, made to fail as OpenMM does on NaN coordinates) is reported as failed."""
    real = compare_module.sample_nvt

    def nan_for_ml(built, **kw):
        if built.treatment == "ml":
            raise openmm.OpenMMException("Particle coordinate is NaN (made up by the test)")
        return real(built, **kw)

    monkeypatch.setattr(compare_module, "sample_nvt", nan_for_ml)
    folder = compare(solvated, treatments=["classical", "ml", "ml+d3"], model="ani1ccx", out=tmp_path / "c", **TINY)
    data = json.loads((folder / "comparison.json").read_text())
    skipped = data["treatments"]["ml+d3"]
    assert skipped["status"] == "skipped"
    assert "TreatmentError" in skipped["reason"] and "dispersion" in skipped["reason"]
    failed = data["treatments"]["ml"]
    assert failed["status"] == "failed" and failed["reason"].startswith("NVT sampling: OpenMMException")
    assert _finite(failed["single_point"]["force_rms_diff_kjmol_nm"])  # what was measured is kept
    assert data["treatments"]["classical"]["status"] == "ok"
    assert any(w.startswith("ml+d3: skipped:") for w in data["warnings"])
    assert any(w.startswith("ml: failed:") for w in data["warnings"])
    md = (folder / "comparison.md").read_text()
    assert "**skipped**" in md and "already includes dispersion" in md and "**failed**" in md
    for png in PNGS:
        assert (folder / png).stat().st_size > 1000, png


def test_reference_that_cannot_be_built_raises(solvated, tmp_path):
    with pytest.raises(TreatmentError, match="already includes dispersion"):
        compare(solvated, treatments=["classical"], reference="ml+d3", model="ani1ccx", out=tmp_path / "c", **TINY)
    assert not (tmp_path / "c").exists()


def test_bad_names_and_options_are_refused(solvated, tmp_path):
    with pytest.raises(TreatmentError, match=re.escape("unknown treatment 'ml+d4'")):
        compare(solvated, treatments=["classical", "ml+d4"], out=tmp_path / "c", **TINY)
    with pytest.raises(OptionError, match=r"term options given for \['qeq'\]"):
        compare(solvated, treatments=["classical", "ml"], term_options={"qeq": {"mode": "rappe-goddard"}},
                out=tmp_path / "c", **TINY)
    assert not (tmp_path / "c").exists()


def test_cli_compare_verb(solvated, tmp_path, monkeypatch, capsys):
    """`mlbridge compare` reaches compare() with the CLI's options (solvation is the fixture's)."""
    monkeypatch.setattr(cli, "_solvated_from_args", lambda a: solvated)
    rc = cli.main(["compare", "CC(=O)Nc1ccc(O)cc1", "--treatments", "classical", "--run-ps", "0.02",
                   "--equil-ps", "0.01", "--nve-ps", "0.03", "--report-every", "3", "--threads", "1",
                   "--no-progress", "--out", str(tmp_path / "cli")])
    assert rc == 0
    assert "comparison.md" in capsys.readouterr().out
    data = json.loads((tmp_path / "cli" / "comparison.json").read_text())
    assert data["settings"]["nve_ps"] == 0.03 and data["treatments"]["classical"]["status"] == "ok"
