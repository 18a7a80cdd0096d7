"""The demo end to end on shortened settings: its report files exist and hold numbers."""
import json
import math

from mlbridge.demo import run_demo


def test_demo_end_to_end(tmp_path):
    out = run_demo(tmp_path / "demo", treatments=["classical", "ml"], quick=True, threads=2)
    check = tmp_path / "demo" / "check"
    summary = json.loads((check / "summary.json").read_text())
    names = [c["treatment"] for c in summary["checks"]]
    assert names == ["classical", "ml"]
    for c in summary["checks"]:
        assert math.isfinite(c["fit"]["slope_kjmol_per_ns"]) and c["speed"]["ms_per_step"] > 0
        assert len(c["trace"]["Total Energy (kJ/mole)"]) > 3
        png = check / f"energy-{c['treatment'].replace('+', '_')}.png"
        assert png.stat().st_size > 10_000
    report = (check / "report.md").read_text()
    assert "ms/step" in report and "kT/ns" in report and "`ml`" in report
    assert (tmp_path / "demo" / "systems" / "ml" / "system.xml").is_file()
    assert "not comparable" in (tmp_path / "demo" / "comparison.md").read_text()
    assert out.exists()
