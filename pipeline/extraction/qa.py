"""QA figures of the 2-D to 1-D reduction of one frame.

* :func:`plot_rectified_frame`: the rectified, sky-subtracted frame
  (wavelength x slit position) with the traced apertures (centre line and
  boxcar limits) and the sky region (pixels used for the sky model) marked,
  plus the collapsed spatial profile beside it.
* :func:`plot_spectra`: every extracted spectrum (optimal, with its 1-sigma
  band; boxcar as a thin line) with masked pixels marked.

Both take the :class:`pipeline.extraction.frame.FrameReduction` of the frame and write
a PNG (matplotlib, Agg backend).
"""

from pathlib import Path

import numpy as np

from pipeline.extraction.outputs import object_labels

__all__ = ["plot_rectified_frame", "plot_spectra"]

_COLOURS = ("tab:orange", "tab:cyan", "tab:green", "tab:pink", "tab:olive")


def _labels(reduction):
    """``target``, ``other1``, ... of the reduction's objects (as in the file names)."""
    roles = tuple(reduction.roles) or ("target",) + ("other",) * (len(reduction.traces) - 1)
    return object_labels(roles)


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def plot_rectified_frame(reduction, path, *, title="", arcsec_per_px=None):
    """Rectified frame with apertures and sky regions.

    Parameters
    ----------
    reduction : pipeline.extraction.frame.FrameReduction
    path : str or Path
        PNG to write.
    title : str
    arcsec_per_px : float, optional
        Slit scale, for a second axis label.
    """
    plt = _pyplot()
    rect = reduction.rectified
    wave = rect.grid.centres_angstrom()
    data = np.where(rect.mask == 0, rect.data, np.nan)
    ny = data.shape[0]
    finite = data[np.isfinite(data)]
    lo, hi = (np.percentile(finite, [2, 99.5]) if finite.size else (0.0, 1.0))
    fig = plt.figure(figsize=(12, 5.2))
    ax = fig.add_axes([0.06, 0.12, 0.72, 0.78])
    axp = fig.add_axes([0.80, 0.12, 0.17, 0.78], sharey=ax)
    extent = (wave[0], wave[-1], -0.5, ny - 0.5)
    cmap = plt.get_cmap("gray").with_extremes(bad="darkred")
    ax.imshow(data, origin="lower", aspect="auto", extent=extent, cmap=cmap,
              vmin=lo, vmax=hi if hi > lo else lo + 1, interpolation="nearest")
    sky_rows = reduction.sky_region.mean(axis=1) > 0.5
    # sky region: shade the rows used as sky on the right edge and outline them
    ax.contour(wave, np.arange(ny), reduction.sky_region.astype(float), levels=[0.5],
               colors="tab:blue", linewidths=0.6, alpha=0.8)
    for i, (tr, h) in enumerate(zip(reduction.traces, reduction.half_widths_px)):
        c = _COLOURS[i % len(_COLOURS)]
        yc = tr.position_px(wave)
        ax.plot(wave, yc, color=c, lw=0.8, label=f"{_labels(reduction)[i]} ({tr.mode}, S/N {tr.snr:.0f})")
        ax.plot(wave, yc - h, color=c, lw=0.6, ls="--")
        ax.plot(wave, yc + h, color=c, lw=0.6, ls="--")
    ax.plot([], [], color="tab:blue", lw=0.6, label="sky region edge")
    ax.plot([], [], "s", color="darkred", ms=5, label="masked pixel")
    ax.set_xlabel("air wavelength (Angstrom)")
    ax.set_ylabel("row of the rectified frame" + (f" ({arcsec_per_px:.2f} arcsec/row)"
                                                  if arcsec_per_px else ""))
    ax.legend(loc="upper right", fontsize=7, framealpha=0.7)
    ax.set_title(title or "rectified, sky-subtracted frame", fontsize=10)
    with np.errstate(all="ignore"):
        import warnings
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            prof = np.nanmedian(data, axis=1)
    rows = np.arange(ny)
    axp.plot(prof, rows, color="k", lw=0.8)
    axp.fill_betweenx(rows, np.nanmin(prof) if np.isfinite(prof).any() else 0, prof,
                      where=sky_rows, color="tab:blue", alpha=0.25, label="sky rows")
    for i, (tr, h) in enumerate(zip(reduction.traces, reduction.half_widths_px)):
        c = _COLOURS[i % len(_COLOURS)]
        axp.axhspan(tr.centre_px - h, tr.centre_px + h, color=c, alpha=0.25)
    axp.set_xlabel("median (e-)")
    axp.tick_params(labelleft=False)
    axp.legend(loc="lower right", fontsize=7)
    Path(path).parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return path


def plot_spectra(reduction, path, *, title=""):
    """Extracted spectra with their uncertainties.

    Parameters
    ----------
    reduction : pipeline.extraction.frame.FrameReduction
    path : str or Path
    title : str
    """
    plt = _pyplot()
    wave = reduction.rectified.grid.centres_angstrom()
    n = max(len(reduction.extractions), 1)
    fig, axes = plt.subplots(n, 1, figsize=(11, 2.6 * n + 0.6), squeeze=False, sharex=True)
    if not reduction.extractions:
        axes[0, 0].text(0.5, 0.5, "no object above the detection threshold",
                        ha="center", va="center", transform=axes[0, 0].transAxes)
    for i, ex in enumerate(reduction.extractions):
        ax = axes[i, 0]
        good = ex.mask == 0
        sig = np.sqrt(np.clip(ex.variance, 0, None))
        f = np.where(good, ex.flux, np.nan)
        ax.fill_between(wave, f - sig, f + sig, color="tab:blue", alpha=0.3, lw=0,
                        step="mid", label="optimal ± 1 sigma")
        ax.plot(wave, f, color="tab:blue", lw=0.7, drawstyle="steps-mid")
        ax.plot(wave, np.where(ex.boxcar_mask == 0, ex.boxcar_flux, np.nan), color="tab:red",
                lw=0.4, alpha=0.7, drawstyle="steps-mid", label="boxcar")
        if (~good).any():
            top = np.nanpercentile(f, 99) if np.isfinite(f).any() else 1.0
            ax.plot(wave[~good], np.full((~good).sum(), top), "|", color="k", ms=4,
                    label="masked")
        finite = f[np.isfinite(f)]
        if finite.size:
            lo, hi = np.percentile(finite, [0.5, 99.5])
            pad = 0.15 * (hi - lo if hi > lo else abs(hi) + 1)
            ax.set_ylim(min(lo - pad, 0), hi + pad)
        tr = reduction.traces[i]
        ax.set_ylabel("electron / pixel")
        ax.set_title(f"{_labels(reduction)[i]}: row {tr.centre_px:.1f}, trace {tr.mode}, "
                     f"median S/N {ex.info['snr_median']:.1f}", fontsize=9)
        ax.legend(loc="upper right", fontsize=7)
    axes[-1, 0].set_xlabel("air wavelength (Angstrom)")
    fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    Path(path).parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return path
