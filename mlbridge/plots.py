"""PNG plots (matplotlib, non-interactive Agg backend)."""
from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402


def plot_energy_trace(result, path: Path) -> Path:
    """Total, potential and kinetic energy against time with the fitted drift line."""
    tr = result.trace
    t = np.asarray(tr["Time (ps)"])
    tot = np.asarray(tr["Total Energy (kJ/mole)"])
    pot = np.asarray(tr["Potential Energy (kJ/mole)"])
    kin = np.asarray(tr["Kinetic Energy (kJ/mole)"])
    fit = result.fit
    fig, axes = plt.subplots(3, 1, figsize=(7, 7), sharex=True)
    axes[0].plot(t, tot - tot[0], lw=1, label="total")
    axes[0].plot(t, fit.intercept_kjmol + fit.slope_kjmol_per_ns * t * 1e-3 - tot[0], "k--", lw=1,
                 label=f"fit: {fit.slope_kjmol_per_ns:.3g} kJ/mol/ns = {fit.slope_kT_per_ns_per_dof:.2g} kT/ns/DOF")
    axes[0].set_ylabel("E_tot - E_tot(0)\n(kJ/mol)")
    axes[0].legend(fontsize=8)
    axes[1].plot(t, pot, lw=1, color="C1")
    axes[1].set_ylabel("potential\n(kJ/mol)")
    axes[2].plot(t, kin, lw=1, color="C2")
    axes[2].set_ylabel("kinetic\n(kJ/mol)")
    axes[2].set_xlabel("time in NVE (ps)")
    fig.suptitle(f"{result.treatment}: NVE at {result.dt_fs} fs")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return Path(path)


# ---------------------------------------------------------------------------------------
# comparison of treatments (mlbridge.compare); plain data in, one PNG out
# ---------------------------------------------------------------------------------------
#: line styles cycled with the colours, so overlapping curves of treatments stay visible
_STYLES = ("-", "--", "-.", ":")


def _empty_panel(ax, text: str) -> None:
    ax.text(0.5, 0.5, text, ha="center", va="center", transform=ax.transAxes, fontsize=10)
    ax.set_xticks([])
    ax.set_yticks([])


def plot_compare_energy(nve: dict, nvt: dict, path: Path) -> Path:
    """Treatments overlaid: NVE total energy minus its start, and NVT potential minus its mean.

    Parameters
    ----------
    nve : {treatment: (times_ps, total_kjmol)}
    nvt : {treatment: (times_ps, potential_minus_mean_kjmol)}
    """
    fig, axes = plt.subplots(2, 1, figsize=(7, 6.5))
    for k, (name, (t, e)) in enumerate(nve.items()):
        e = np.asarray(e, float)
        axes[0].plot(np.asarray(t, float), e - e[0], lw=1, label=name, ls=_STYLES[k % len(_STYLES)])
    axes[0].set_xlabel("time in NVE (ps)")
    axes[0].set_ylabel("E_tot - E_tot(0)\n(kJ/mol)")
    axes[0].set_title("NVE total energy (drift check)", fontsize=10)
    for k, (name, (t, e)) in enumerate(nvt.items()):
        axes[1].plot(np.asarray(t, float), np.asarray(e, float), lw=1, label=name, ls=_STYLES[k % len(_STYLES)])
    axes[1].set_xlabel("time in NVT sampling (ps)")
    axes[1].set_ylabel("E_pot - <E_pot>\n(kJ/mol)")
    axes[1].set_title("potential energy relative to each treatment's own mean", fontsize=10)
    for ax, d in zip(axes, (nve, nvt)):
        if d:
            ax.legend(fontsize=8)
        else:
            _empty_panel(ax, "no treatment ran")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return Path(path)


def _panel_grid(n_panels: int, empty_message: str):
    """A figure of up to two columns of panels, one per item; with no item, one panel saying
    ``empty_message``. Returns (figure, flat array of axes)."""
    n = max(1, n_panels)
    cols = min(n, 2)
    rows = int(np.ceil(n / cols))
    fig, axes = plt.subplots(rows, cols, figsize=(5.5 * cols, 3.2 * rows), squeeze=False)
    flat = axes.ravel()
    if not n_panels:
        _empty_panel(flat[0], empty_message)
    return fig, flat


def _save_panel_grid(fig, flat, n_panels: int, path: Path) -> Path:
    """Hide the unused panels of a :func:`_panel_grid` figure, save it and close it."""
    for ax in flat[n_panels or 1:]:
        ax.set_visible(False)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return Path(path)


def plot_compare_torsions(labels: list, histograms: dict, path: Path) -> Path:
    """One panel per torsion, the treatments' normalised histograms overlaid.

    Parameters
    ----------
    labels : torsion labels, one per panel
    histograms : {treatment: [(edges_deg, density_per_deg) per torsion]}
    """
    fig, flat = _panel_grid(len(labels), "the ligand has no rotatable torsion")
    for q, label in enumerate(labels):
        ax = flat[q]
        for k, (name, hs) in enumerate(histograms.items()):
            edges, dens = (np.asarray(a, float) for a in hs[q])
            ax.stairs(dens, edges, label=name, lw=1.3, ls=_STYLES[k % len(_STYLES)])
        ax.set_title(label, fontsize=10)
        ax.set_xlim(-180, 180)
        ax.set_xticks(range(-180, 181, 60))
        ax.set_xlabel("dihedral (degrees)")
        ax.set_ylabel("density (1/degree)")
        if histograms:
            ax.legend(fontsize=7)
    return _save_panel_grid(fig, flat, len(labels), path)


def plot_compare_rdfs(sites: list, rdfs: dict, path: Path) -> Path:
    """One panel per ligand site, the treatments' g(r) to water oxygen overlaid.

    Parameters
    ----------
    sites : site labels, one per panel
    rdfs : {treatment: [(r_nm, g) per site]}
    """
    fig, flat = _panel_grid(len(sites), "no ligand N/O or no water oxygens")
    for k, site in enumerate(sites):
        ax = flat[k]
        for j, (name, rows_) in enumerate(rdfs.items()):
            r, g = (np.asarray(a, float) for a in rows_[k])
            ax.plot(r, g, lw=1, label=name, ls=_STYLES[j % len(_STYLES)])
        ax.axhline(1.0, color="0.6", lw=0.5, ls=":")
        ax.set_title(f"{site} - water O", fontsize=10)
        ax.set_xlabel("r (nm)")
        ax.set_ylabel("g(r)")
        if rdfs:
            ax.legend(fontsize=7)
    return _save_panel_grid(fig, flat, len(sites), path)


def plot_compare_speed(speeds: dict, path: Path, threads: int = None) -> Path:
    """Per treatment, the work per MD step stacked (classical part, each region term) and the
    measured ms/step marked on it: above the stack is bridge overhead, below it is region-term
    time hidden behind the classical forces (they run in a worker thread beside them).

    Parameters
    ----------
    speeds : {treatment: (classical_ms, {term: ms}, overhead_ms)}, overhead = measured - stack
    """
    names = list(speeds)
    fig, ax = plt.subplots(figsize=(max(5.0, 1.3 * len(names) + 2), 4.2))
    if not names:
        _empty_panel(ax, "no treatment ran")
    terms = []
    for _c, tm, _o in speeds.values():
        terms += [t for t in tm if t not in terms]
    x = np.arange(len(names))
    bottom = np.zeros(len(names))
    parts = [("classical part", [speeds[n][0] for n in names])]
    parts += [(f"region: {t}", [speeds[n][1].get(t, 0.0) for n in names]) for t in terms]
    for k, (label, vals) in enumerate(parts):
        vals = np.nan_to_num(np.asarray(vals, float))
        if names and (vals.any() or k == 0):
            ax.bar(x, vals, bottom=bottom, label=label, width=0.6)
        bottom += vals
    measured = bottom + np.nan_to_num(np.asarray([speeds[n][2] for n in names], float))
    if names:
        ax.scatter(x, measured, marker="_", s=900, color="black", linewidths=2.5, zorder=3,
                   label="measured ms/step")
    for i, n in enumerate(names):
        ax.text(x[i], max(bottom[i], measured[i]), f"{measured[i]:.2f}\n(overhead {speeds[n][2]:+.2f})",
                ha="center", va="bottom", fontsize=7)
    ax.set_xticks(x)
    ax.set_xticklabels(names, rotation=15)
    ax.set_ylabel("ms per MD step")
    ax.set_title("where the time goes" + (f" ({threads} thread{'s' if threads != 1 else ''})" if threads else ""),
                 fontsize=10)
    if names:
        ax.legend(fontsize=7)
        ax.set_ylim(0, max(bottom.max(), measured.max(), 1e-3) * 1.25)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return Path(path)
