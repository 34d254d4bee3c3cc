"""PNG plots of a closed-loop run: outputs against references, inputs against limits,
sigma_min with the watchdog levels and the mode over time (matplotlib, no screen needed)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from linz_ros.runtime import MODES, SimResult

__all__ = ["plot_run"]


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def plot_run(result: SimResult, out_dir: str | Path) -> list[Path]:
    """Write ``outputs.png``, ``inputs.png`` and ``conditioning.png`` for one run.

    Parameters
    ----------
    result : SimResult
    out_dir : str or pathlib.Path

    Returns
    -------
    list of pathlib.Path
        The files written.
    """
    plt = _pyplot()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    a = result.artifact
    t = result.t
    paths = []

    p = len(a.outputs)
    fig, axes = plt.subplots(p, 1, figsize=(8, 2.2 * p + 0.6), sharex=True, squeeze=False)
    refs = result.reference_values()
    for i, name in enumerate(a.outputs):
        ax = axes[i, 0]
        ax.plot(t, result.y[:, i], label=name)
        ax.plot(t, refs[:, i], "--", label=f"{name} reference")
        ax.set_ylabel(name)
        ax.grid(True, alpha=0.3)
        ax.legend(loc="best", fontsize=8)
    axes[-1, 0].set_xlabel("time [s]")
    fig.suptitle(f"{a.name}: outputs and references")
    paths.append(_save(fig, out / "outputs.png", plt))

    m = len(a.inputs)
    fig, axes = plt.subplots(m, 1, figsize=(8, 2.2 * m + 0.6), sharex=True, squeeze=False)
    for j, name in enumerate(a.inputs):
        ax = axes[j, 0]
        ax.step(t, result.u[:, j], where="post", label=name)
        lo, hi = a.input_limits[j]
        for bound in (lo, hi):
            if np.isfinite(bound):
                ax.axhline(bound, color="red", linestyle=":", linewidth=1)
        saturated = result.saturated[:, j]
        if saturated.any():
            ax.plot(t[saturated], result.u[saturated, j], "r.", markersize=3, label="saturated")
        ax.set_ylabel(name)
        ax.grid(True, alpha=0.3)
        ax.legend(loc="best", fontsize=8)
    axes[-1, 0].set_xlabel("time [s]")
    fig.suptitle(f"{a.name}: inputs and their limits")
    paths.append(_save(fig, out / "inputs.png", plt))

    fig, (ax1, ax2) = plt.subplots(2, 1, figsize=(8, 5), sharex=True, gridspec_kw={"height_ratios": [3, 1]})
    sigma = np.where(result.sigma_min > 0, result.sigma_min, np.nan)
    ax1.semilogy(t, sigma, label="sigma_min of A(x)")
    w = a.watchdog
    for key, style in (("sigma_warn", "y--"), ("sigma_act", "m--"), ("sigma_stop", "r--")):
        if w[key] > 0:
            ax1.axhline(w[key], color=style[0], linestyle="--", linewidth=1, label=key)
    ax1.set_ylabel("sigma_min")
    ax1.grid(True, which="both", alpha=0.3)
    ax1.legend(loc="best", fontsize=8)
    codes = np.array([MODES.index(mode) for mode in result.mode])
    ax2.step(t, codes, where="post")
    ax2.set_yticks(range(len(MODES)), MODES)
    ax2.set_ylim(-0.5, len(MODES) - 0.5)
    ax2.set_xlabel("time [s]")
    ax2.grid(True, alpha=0.3)
    fig.suptitle(f"{a.name}: conditioning and watchdog mode")
    paths.append(_save(fig, out / "conditioning.png", plt))
    return paths


def _save(fig, path: Path, plt) -> Path:
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
