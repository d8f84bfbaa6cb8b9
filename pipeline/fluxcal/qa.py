"""QA figures of the flux calibration (matplotlib, written as PNG).

Functions take result objects of :mod:`pipeline.fluxcal` (sensitivity, calibrate) and a path; they
never compute science themselves.
"""

from pathlib import Path

import numpy as np

__all__ = ["plot_sensitivity", "plot_fluxed_spectra", "plot_message"]


def _pyplot():
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    return plt


def _shade(ax, regions, lo, hi):
    for a, b in regions or ():
        if b >= lo and a <= hi:
            ax.axvspan(max(a, lo), min(b, hi), color="0.88", zorder=0, lw=0)


def plot_sensitivity(fit, points, path, *, title="", exclude_regions=()):
    """Sensitivity points, the fitted curve and the residuals in percent.

    Parameters
    ----------
    fit : pipeline.fluxcal.sensitivity.SensitivityFit
    points : sequence of pipeline.fluxcal.sensitivity.SensitivityPoints
        In the order given to the fit (rejection flags are matched by index).
    path : str or Path
        PNG to write.
    title : str
    exclude_regions : sequence of [min, max], Angstrom
        Shaded in both panels.
    """
    plt = _pyplot()
    fig, (ax, axr) = plt.subplots(2, 1, figsize=(9, 6.5), sharex=True,
                                  gridspec_kw={"height_ratios": [2, 1]})
    lo, hi = fit.wave_min, fit.wave_max
    for p in points:
        lo, hi = min(lo, np.nanmin(p.wave_angstrom)), max(hi, np.nanmax(p.wave_angstrom))
    _shade(ax, exclude_regions, lo, hi)
    _shade(axr, exclude_regions, lo, hi)
    colours = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    rejected_sets = fit.info.get("rejected", [])
    for i, p in enumerate(points):
        colour = colours[i % len(colours)]
        rejected = rejected_sets[i] if i < len(rejected_sets) else np.zeros_like(p.usable)
        used = p.for_fit & ~rejected
        label = f"{p.info.get('frame', '')} X={p.info.get('airmass', float('nan')):.3f}"
        ax.plot(p.wave_angstrom[used], p.sens_mag[used], ".", ms=2, color=colour, label=label)
        ax.plot(p.wave_angstrom[p.usable & p.excluded], p.sens_mag[p.usable & p.excluded], ".",
                ms=2, color="0.6")
        ax.plot(p.wave_angstrom[rejected], p.sens_mag[rejected], "x", ms=4, color="tab:red")
        model = fit.mag(p.wave_angstrom)
        resid = 100.0 * (10.0 ** (0.4 * (p.sens_mag - model)) - 1.0)
        axr.plot(p.wave_angstrom[used], resid[used], ".", ms=2, color=colour)
        axr.plot(p.wave_angstrom[rejected], resid[rejected], "x", ms=4, color="tab:red")
    reach = getattr(fit, "max_extrapolation_angstrom", 0.0)
    grid = np.linspace(max(lo, fit.wave_min - reach), min(hi, fit.wave_max + reach), 800)
    mag, err = fit.mag(grid), fit.mag_error(grid)
    ax.plot(grid, mag, "k-", lw=1.2, label=f"{fit.kind} fit (degree {fit.degree})")
    ax.fill_between(grid, mag - err, mag + err, color="k", alpha=0.25, lw=0)
    ax.set_ylabel("2.5 log10 S  [S in e- cm2 / erg]")
    ax.legend(loc="best", fontsize=8, markerscale=4)
    info = fit.info
    ax.set_title(title or "sensitivity")
    axr.axhline(0.0, color="k", lw=0.8)
    axr.set_ylabel("data / fit - 1  [%]")
    axr.set_xlabel("wavelength (air)  [Angstrom]")
    axr.text(0.01, 0.95, f"rms {info.get('rms_percent', float('nan')):.2f} % per pixel, "
             f"{info.get('rms_binned_percent', float('nan')):.2f} % in "
             f"{info.get('bin_width_angstrom', 100):.0f}-A bins; {info.get('n_rejected', 0)} of "
             f"{info.get('n_points', 0)} rejected", transform=axr.transAxes, va="top", fontsize=8)
    finite = np.isfinite(axr.get_lines()[0].get_ydata()) if axr.get_lines() else None
    if finite is not None and finite.any():
        spread = np.nanpercentile(np.abs(axr.get_lines()[0].get_ydata()), 99)
        axr.set_ylim(-max(1.0, 1.5 * spread), max(1.0, 1.5 * spread))
    fig.tight_layout()
    Path(path).parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return path


def plot_fluxed_spectra(spectra, path, *, title="", reference=None):
    """Calibrated spectra of one frame with their 1-sigma uncertainty.

    Parameters
    ----------
    spectra : sequence of (label, pipeline.fluxcal.calibrate.CalibratedSpectrum)
    path : str or Path
    reference : pipeline.fluxcal.standards.FluxTable, optional
        Drawn over the spectra (a standard star's table).
    """
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(9, 4.5))
    for label, spec in spectra:
        good = (spec.mask == 0) & np.isfinite(spec.flux)
        flux = np.where(good, spec.flux, np.nan)
        sig = np.sqrt(np.where(good, spec.variance, np.nan))
        line, = ax.plot(spec.wave_angstrom, flux, lw=0.8, label=label)
        ax.fill_between(spec.wave_angstrom, flux - sig, flux + sig, color=line.get_color(),
                        alpha=0.3, lw=0)
    if reference is not None and spectra:
        lo = min(float(np.nanmin(s.wave_angstrom)) for _, s in spectra)
        hi = max(float(np.nanmax(s.wave_angstrom)) for _, s in spectra)
        sel = (reference.wave_angstrom >= lo) & (reference.wave_angstrom <= hi)
        ax.plot(reference.wave_angstrom[sel], reference.flux[sel], "-", color="tab:red",
                lw=0.8, alpha=0.7, zorder=3,
                drawstyle="steps-mid" if reference.bin_width_angstrom is not None else "default",
                label=f"table {reference.name}")
    if not spectra:
        ax.text(0.5, 0.5, "no spectrum", transform=ax.transAxes, ha="center")
    ax.set_xlabel("wavelength (air)  [Angstrom]")
    ax.set_ylabel("f_lambda  [erg / s / cm2 / Angstrom]")
    ax.set_title(title)
    if spectra:
        ax.legend(loc="best", fontsize=8)
        values = np.concatenate([s.flux[(s.mask == 0) & np.isfinite(s.flux)]
                                 for _, s in spectra] or [np.array([0.0])])
        if values.size > 10:
            lo, hi = np.percentile(values, [0.5, 99.5])
            pad = 0.1 * (hi - lo) if hi > lo else 1.0
            ax.set_ylim(min(0.0, lo - pad), hi + pad)
    fig.tight_layout()
    Path(path).parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return path


def plot_message(path, message, *, title=""):
    """A placeholder figure that states why there is nothing to plot."""
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(9, 3))
    ax.axis("off")
    ax.text(0.5, 0.5, message, ha="center", va="center", wrap=True, fontsize=11)
    ax.set_title(title)
    Path(path).parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return path
