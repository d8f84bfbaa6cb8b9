"""QA figure of one coadd: the combined spectrum over its exposures, and where pixels
were rejected or not covered."""

import numpy as np

__all__ = ["plot_group"]


def plot_group(result, path):
    """Save the figure of a :class:`pipeline.combine.steps.GroupResult` to ``path``."""
    import matplotlib
    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    wave = result.grid.centres_angstrom()
    fig = Figure(figsize=(10, 5), dpi=80, layout="constrained")
    top, bottom = fig.subplots(2, 1, sharex=True, height_ratios=(3, 1))
    for exp in result.exposures:
        shown = np.where(exp.mask == 0, exp.flux, np.nan)
        top.plot(wave, shown, linewidth=0.5, alpha=0.6, label=f"{exp.frame} "
                 f"(v {exp.choice.velocity_km_s:+.2f} km/s)")
    top.plot(wave, np.where(result.mask == 0, result.flux, np.nan), color="black",
             linewidth=0.9, label=f"coadd of {len(result.exposures)}")
    good = result.mask == 0
    if good.any():
        lo, hi = np.nanpercentile(result.flux[good], [1, 99.5])
        pad = 0.15 * (hi - lo) if hi > lo else 1.0
        top.set_ylim(lo - pad, hi + pad)
    top.set_ylabel(result.unit, fontsize=8)
    top.legend(fontsize=7, ncol=2)
    medium = "vacuum" if result.grid.vacuum else "air"
    frame = result.exposures[0].choice.frame
    top.set_title(f"{result.plan.object}  {result.plan.setup}  ({result.plan.input_kind} inputs; "
                  f"{medium}, {frame})", fontsize=9)
    bottom.step(wave, result.n_used, where="mid", color="#2c3e50", linewidth=0.8,
                label="exposures used")
    bottom.step(wave, result.n_rejected, where="mid", color="#c0392b", linewidth=0.8,
                label="rejected")
    bottom.set_ylabel("pixels", fontsize=8)
    bottom.set_xlabel(f"{medium} wavelength, {frame} (Å)", fontsize=8)
    bottom.legend(fontsize=7)
    for ax in (top, bottom):
        ax.tick_params(labelsize=7)
    fig.savefig(path)
