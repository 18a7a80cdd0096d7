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
