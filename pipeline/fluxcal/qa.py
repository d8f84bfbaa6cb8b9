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


def _effective_area_cm2(sensitivity, wave_angstrom):
    """S (e- cm2 / erg) as the collecting area of a perfect telescope: S h c / lambda (cm2)."""
    from astropy import constants, units as u

    hc = (constants.h * constants.c).to_value(u.erg * u.AA)
    return np.asarray(sensitivity) * hc / np.asarray(wave_angstrom)


def _airmass_colours(plt, points):
    airmasses = [float(p.info.get("airmass", np.nan)) for p in points]
    finite = [a for a in airmasses if np.isfinite(a)] or [1.0]
    lo, hi = min(finite), max(finite)
    if hi - lo < 0.1:
        lo, hi = lo - 0.05, hi + 0.05
    norm = plt.Normalize(lo, hi)
    cmap = plt.get_cmap("plasma_r")
    return airmasses, norm, cmap


def plot_sensitivity(fit, points, path, *, title="", exclude_regions=(), telluric_bands=()):
    """The sensitivity as an effective collecting area, the fit's band and the residuals.

    Top: ``A_eff = S h c / lambda`` (cm2: the area of a perfect telescope giving the
    observed count rate; instrument-independent units), each standard's pixels
    coloured by its airmass, the fitted curve with its 1-sigma band; bottom: the
    residuals in percent with their 100-A means. Masked regions (the stars' lines)
    are hatched, telluric bands shaded blue; rejected pixels are crosses.

    Parameters
    ----------
    fit : pipeline.fluxcal.sensitivity.SensitivityFit
    points : sequence of pipeline.fluxcal.sensitivity.SensitivityPoints
        In the order given to the fit (rejection flags are matched by index).
    path : str or Path
        PNG to write.
    exclude_regions, telluric_bands : sequence of [min, max], Angstrom
    """
    plt = _pyplot()
    fig = plt.figure(figsize=(10, 6.2))
    grid = fig.add_gridspec(2, 2, height_ratios=[2.2, 1], width_ratios=[40, 1], hspace=0.08,
                            wspace=0.03)
    ax = fig.add_subplot(grid[0, 0])
    axr = fig.add_subplot(grid[1, 0], sharex=ax)
    cax = fig.add_subplot(grid[0, 1])
    lo, hi = fit.wave_min, fit.wave_max
    for p in points:
        lo, hi = min(lo, np.nanmin(p.wave_angstrom)), max(hi, np.nanmax(p.wave_angstrom))
    for axis in (ax, axr):
        for a, b in exclude_regions or ():
            if b >= lo and a <= hi:
                axis.axvspan(max(a, lo), min(b, hi), facecolor="none", edgecolor="0.6",
                             hatch="///", lw=0, zorder=0)
        for a, b in telluric_bands or ():
            if b >= lo and a <= hi:
                axis.axvspan(max(a, lo), min(b, hi), color="tab:blue", alpha=0.12, lw=0,
                             zorder=0)
    airmasses, norm, cmap = _airmass_colours(plt, points)
    rejected_sets = fit.info.get("rejected", [])
    all_w, all_r = [], []
    for i, p in enumerate(points):
        colour = cmap(norm(airmasses[i])) if np.isfinite(airmasses[i]) else "k"
        rejected = rejected_sets[i] if i < len(rejected_sets) else np.zeros_like(p.usable)
        used = p.for_fit & ~rejected
        area = _effective_area_cm2(10.0 ** (0.4 * p.sens_mag), p.wave_angstrom)
        ax.scatter(p.wave_angstrom[used], area[used], s=3, color=colour, lw=0,
                   label=f"{p.info.get('frame', '')} ({p.info.get('object', '')}), "
                         f"X = {airmasses[i]:.3f}")
        shown = p.usable & p.excluded
        ax.scatter(p.wave_angstrom[shown], area[shown], s=2, color="0.7", lw=0)
        ax.plot(p.wave_angstrom[rejected], area[rejected], "x", ms=4, color="tab:red")
        resid = 100.0 * (10.0 ** (0.4 * (p.sens_mag - fit.mag(p.wave_angstrom))) - 1.0)
        axr.scatter(p.wave_angstrom[used], resid[used], s=2, color=colour, lw=0, alpha=0.6)
        axr.plot(p.wave_angstrom[rejected], resid[rejected], "x", ms=4, color="tab:red")
        all_w.append(p.wave_angstrom[used])
        all_r.append(resid[used])
    reach = getattr(fit, "max_extrapolation_angstrom", 0.0)
    wave = np.linspace(max(lo, fit.wave_min - reach), min(hi, fit.wave_max + reach), 800)
    mag, err = fit.mag(wave), fit.mag_error(wave)
    curve = _effective_area_cm2(10.0 ** (0.4 * mag), wave)
    band_lo = _effective_area_cm2(10.0 ** (0.4 * (mag - err)), wave)
    band_hi = _effective_area_cm2(10.0 ** (0.4 * (mag + err)), wave)
    ax.fill_between(wave, band_lo, band_hi, color="k", alpha=0.2, lw=0,
                    label="fit 1-sigma band")
    ax.plot(wave, curve, "-", color="k", lw=1.0, label=f"{fit.kind} fit (degree {fit.degree})")
    rel = 100.0 * (10.0 ** (0.4 * err) - 1.0)
    axr.fill_between(wave, -rel, rel, color="k", alpha=0.2, lw=0)
    axr.axhline(0.0, color="k", lw=0.6)
    if all_w:
        w, r = np.concatenate(all_w), np.concatenate(all_r)
        edges = np.arange(w.min(), w.max() + 100.0, 100.0)
        idx = np.digitize(w, edges)
        centres, means, errs = [], [], []
        for k in np.unique(idx):
            sel = idx == k
            if sel.sum() >= 5:
                centres.append(w[sel].mean())
                means.append(r[sel].mean())
                errs.append(r[sel].std() / np.sqrt(sel.sum()))
        axr.errorbar(centres, means, yerr=errs, fmt="o", ms=3, color="k", lw=0.8,
                     label="100-A means")
        spread = np.nanpercentile(np.abs(r), 99) if r.size else 1.0
        axr.set_ylim(-max(1.0, 1.3 * spread), max(1.0, 1.3 * spread))
    top = np.nanmax(curve) if np.isfinite(curve).any() else 1.0
    ax.set_ylim(0.0, 1.25 * top)
    ax.set_ylabel("effective area  S hc/lambda  [cm2]")
    ax.tick_params(labelbottom=False)
    ax.legend(loc="lower center", fontsize=7, markerscale=3, ncol=2, framealpha=0.8)
    info = fit.info
    ax.set_title(title or "sensitivity", fontsize=10)
    ax.text(0.01, 0.97, f"rms {info.get('rms_percent', float('nan')):.2f} % per pixel, "
            f"{info.get('rms_binned_percent', float('nan')):.2f} % in "
            f"{info.get('bin_width_angstrom', 100):.0f}-A bins; {info.get('n_rejected', 0)} of "
            f"{info.get('n_points', 0)} pixels rejected; hatched: masked lines, blue: telluric",
            transform=ax.transAxes, va="top", fontsize=7)
    axr.set_ylabel("standard / fit - 1  [%]")
    axr.set_xlabel("air wavelength  [Angstrom]")
    colourbar = fig.colorbar(plt.cm.ScalarMappable(norm=norm, cmap=cmap), cax=cax)
    colourbar.set_label("airmass of the standard")
    Path(path).parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=90, bbox_inches="tight")
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
