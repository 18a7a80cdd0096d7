"""Reports of the NVE check: summary.json, report.md and PNG plots in one folder, written atomically."""
from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Sequence

from .build import _jsonable, atomic_folder
from .drift import CheckResult


def _f(x, fmt=".3g") -> str:
    try:
        if x is None or (isinstance(x, float) and math.isnan(x)):
            return "n/a"
        return format(x, fmt)
    except (TypeError, ValueError):
        return str(x)


def check_section(r: CheckResult, plot_name: str = "") -> list:
    """Markdown lines for one treatment's check."""
    fit, sp = r.fit, r.speed
    verdict = {"pass": "PASS", "drifts": "WARNING: drifts", "unresolved": "UNRESOLVED: run longer"}[r.status]
    lines = [
        f"## Treatment `{r.treatment}`: {verdict}",
        "",
        f"{r.metadata.get('treatment_summary', '')}",
        "",
        "| quantity | value |",
        "|---|---|",
        f"| timestep | {r.dt_fs} fs (NVT {r.equilibration_ps} ps, then NVE {r.nve_ps} ps at {r.temperature_k} K start) |",
        f"| drift | {_f(fit.slope_kjmol_per_ns)} ± {_f(fit.slope_stderr_kjmol_per_ns)} kJ/mol/ns (1 sigma, for correlated residuals: statistical inefficiency g = {_f(fit.statistical_inefficiency, '.1f')}) |",
        f"| drift per DOF | {_f(fit.slope_kjmol_per_ns_per_dof)} kJ/mol/ns = {_f(fit.slope_kT_per_ns_per_dof)} kT/ns (threshold {r.threshold_kT_per_ns_per_dof} kT/ns, N_dof = {fit.n_dof}) |",
        f"| fluctuation ratio std(E_tot)/std(E_kin) | {_f(fit.fluctuation_ratio)} |",
        f"| speed ({sp.threads} threads) | {_f(sp.ms_per_step, '.2f')} ms/step, {_f(sp.ns_per_day, '.2f')} ns/day |",
        f"| classical part alone | {_f(sp.classical_ms_per_step, '.2f')} ms/step |",
    ]
    for name, ms in sp.terms_ms.items():
        lines.append(f"| region term `{name}` | {_f(ms, '.2f')} ms/call |")
    if sp.terms_ms:
        frac = sp.bridge_overhead_ms / sp.terms_total_ms if sp.terms_total_ms else float("nan")
        lines.append(f"| bridge overhead (total - classical - terms) | {_f(sp.bridge_overhead_ms, '.2f')} ms/step ({_f(100 * frac, '.1f')}% of the terms) |")
        if sp.overlap:
            lines.append(f"| region terms beside the classical forces | yes: a worker thread evaluates them while OpenMM computes the classical forces (a negative overhead is the time hidden); waiting for them: {_f(sp.wait_ms, '.2f')} ms/step |")
        else:
            lines.append("| region terms beside the classical forces | no (MLBRIDGE_SERIAL_TERMS is set): terms run one after the classical forces |")
    for t in r.metadata.get("terms", []):
        prec = t.get("options", {}).get("precision")
        extra = f", precision {prec}" if prec else ""
        if prec == "float32":
            extra += " (the default, chosen by measured NVE drift and speed: see the docstring of mlbridge.terms.ani)"
        lines.append(f"| term `{t['name']}` (group {t['group']}) | reference {t['reference']}, dispersion {t['dispersion']}, elements {', '.join(t['elements'][:8])}{'...' if len(t['elements']) > 8 else ''}{extra} |")
    u = r.uncertainty
    if u:
        lines.append(f"| ANI ensemble spread | mean {_f(u['ensemble_std_kjmol_mean'])} kJ/mol, max {_f(u['ensemble_std_kjmol_max'])} kJ/mol; "
                     f"rho max {_f(u['rho_kcal_per_sqrt_atom_max'])} kcal/mol/sqrt(atom) (threshold {u['threshold_kcal_per_sqrt_atom']}, {u['threshold_source']}) over {u['samples']} samples |")
    q = r.qeq
    if q:
        lines.append(f"| QEq dipole | vacuum {_f(q['dipole_vacuum_debye'])} D, in water (mean) {_f(q['dipole_debye_mean'])} D |")
        lines.append(f"| QEq charge spread along the run | max std {_f(max(q['charges_std_e']) if q['charges_std_e'] else float('nan'))} e |")
    d3 = r.metadata.get("d3_start_energy_kjmol")
    if d3 is not None:
        lines.append(f"| D3(BJ) energy of the start structure | {_f(d3)} kJ/mol |")
    if plot_name:
        lines += ["", f"![energies]({plot_name})"]
    lines.append("")
    return lines


CAUTIONS = [
    "Absolute energies of different treatments have different references and are not comparable; "
    "compare drifts, speeds, forces and structures.",
    "A short NVE check bounds gross problems only; the drift's standard error is given beside it. "
    "Run it at the timestep and length you plan to use before trusting a production run.",
    "Timings depend on this machine's load; the thread count is stated with each figure.",
]


def write_check_report(results: Sequence[CheckResult], folder, *, title: str = "mlbridge setup check",
                       plots: bool = True) -> Path:
    """Write ``summary.json``, ``report.md`` and ``energy-<treatment>.png`` into ``folder``."""
    with atomic_folder(folder) as tmp:
        warnings = [w for r in results for w in r.warnings]
        lines = [f"# {title}", ""]
        if warnings:
            lines += ["**Warnings**", ""] + [f"- {w}" for w in warnings] + [""]
        else:
            lines += ["No warnings: every treatment stayed within the drift and uncertainty thresholds.", ""]
        meta = results[0].metadata if results else {}
        lines += ["System: " + ", ".join(f"{k} {meta[k]}" for k in ("ligand_smiles", "n_waters", "box_shape", "nonbonded", "constraints") if k in meta), ""]
        lines += ["| treatment | drift (kT/ns/DOF) | verdict | ms/step | ns/day |", "|---|---|---|---|---|"]
        for r in results:
            lines.append(f"| `{r.treatment}` | {_f(r.fit.slope_kT_per_ns_per_dof)} | {r.status} | {_f(r.speed.ms_per_step, '.2f')} | {_f(r.speed.ns_per_day, '.2f')} |")
        lines.append("")
        for r in results:
            name = ""
            if plots:
                from .plots import plot_energy_trace
                name = f"energy-{r.treatment.replace('+', '_')}.png"
                plot_energy_trace(r, tmp / name)
            lines += check_section(r, name)
        lines += ["## Cautions", ""] + [f"- {c}" for c in CAUTIONS] + [""]
        (tmp / "report.md").write_text("\n".join(lines))
        summary = {"title": title, "warnings": warnings, "checks": [r.to_dict() for r in results]}
        (tmp / "summary.json").write_text(json.dumps(summary, indent=2, default=_jsonable))
    return Path(folder)
