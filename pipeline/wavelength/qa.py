"""Figures the observer inspects in the morning for each wavelength solution.

Each function takes result objects of :mod:`pipeline.wavelength.tilt` and returns a
matplotlib ``Figure`` (object API, no pyplot state, Agg canvas), so it can be
tested or saved anywhere; :func:`write_figures` saves the four PNGs of one arc:

* ``arc_lines_figure``: the arc spectrum with identified lines labelled
  (wavelength and species), lines rejected by the fit and unidentified
  detections marked differently;
* ``residuals_figure``: residuals of the 1-D fit against wavelength, in
  Angstrom and km/s, used and rejected lines shown differently;
* ``residual_map_figure``: the traced points over the detector coloured by
  their residual from the 2-D solution;
* ``dispersion_figure``: the fitted dispersion across the detector against the
  nominal and fitted physical models, with the local dispersion between
  neighbouring identified lines.
"""

from pathlib import Path

import numpy as np

from pipeline.core.constants import SPEED_OF_LIGHT_KM_S

__all__ = ["arc_lines_figure", "residuals_figure", "residual_map_figure", "dispersion_figure",
           "write_figures"]

_USED = "#1b6ca8"       # blue: lines in the fit
_REJECTED = "#d1495b"   # red: lines clipped by the fit
_OTHER = "#8c8c8c"      # grey: detections without an identification


def _figure(width=10.0, height=4.5):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def arc_lines_figure(solution, flux, lines, *, title=""):
    """Arc spectrum (reference band) with the identified lines labelled.

    Parameters
    ----------
    solution : WavelengthSolution2D
    flux : ndarray, shape (nx,), electron
        The spectrum the lines were measured on.
    lines : ArcLines
        All detected lines.
    """
    s1 = solution.solution_1d
    fig = _figure(12, 5)
    ax = fig.add_subplot()
    x = np.arange(flux.size)
    ax.plot(x, flux, color="black", lw=0.7)
    floor = max(np.nanpercentile(flux, 5), 1.0)
    ax.set_yscale("symlog", linthresh=max(10 * floor, 10.0))
    matched = set(int(i) for i in s1.lines["detected_index"])
    for i, xd in enumerate(lines.x_px):
        if i not in matched:
            ax.axvline(xd, color=_OTHER, lw=0.6, ls=":", zorder=0)
    top = np.nanmax(flux) if flux.size else 1.0
    for xm, wave, sp, used in zip(s1.lines["x_px"], s1.lines["wave_angstrom"],
                                  s1.lines["species"], s1.lines["used"]):
        color = _USED if used else _REJECTED
        ax.axvline(xm, color=color, lw=0.6, alpha=0.6, zorder=0)
        k = int(np.clip(round(xm), 0, flux.size - 1))
        ax.annotate(f"{wave:.2f} {sp}", (xm, max(flux[k], floor)), xytext=(0, 4),
                    textcoords="offset points", rotation=90, fontsize=6, color=color,
                    ha="center", va="bottom")
    ax.set_ylim(bottom=1.5 * min(float(np.nanpercentile(flux, 1)), -1.0), top=top * 8)
    ax.set_xlim(0, flux.size - 1)
    ax.set_xlabel("pixel along the dispersion")
    ax.set_ylabel("electrons (band sum)")
    sec = ax.secondary_xaxis("top", functions=(s1.wavelength, s1.pixel))
    sec.set_xlabel("air wavelength (Angstrom)")
    ax.set_title(f"{title}\n{s1.n_used} lines used (blue), {s1.n_rejected} rejected (red), "
                 f"{len(lines) - len(s1.lines['x_px'])} detections not identified (grey dotted)",
                 fontsize=9)
    return fig


def residuals_figure(solution, *, title=""):
    """Residuals (Angstrom, km/s) of the 1-D fit against wavelength."""

    s1 = solution.solution_1d
    fig = _figure(10, 4.5)
    ax = fig.add_subplot()
    wave = s1.lines["wave_angstrom"]
    res = s1.lines["residual_angstrom"]
    used = s1.lines["used"]
    err = s1.lines["x_err_px"] * np.abs(s1.dispersion(s1.lines["x_px"]))
    ax.axhline(0, color="black", lw=0.8)
    ax.axhspan(-s1.rms_angstrom, s1.rms_angstrom, color=_USED, alpha=0.12, lw=0)
    ax.errorbar(wave[used], res[used], yerr=err[used], fmt="o", ms=4, color=_USED,
                label=f"used ({used.sum()})")
    if (~used).any():
        ax.plot(wave[~used], res[~used], "x", ms=7, mew=1.5, color=_REJECTED,
                label=f"rejected ({(~used).sum()})")
    lim = max(5 * s1.rms_angstrom, 1.2 * float(np.max(np.abs(res[used]))) if used.any() else 0.1)
    ax.set_ylim(-lim, lim)
    ax.set_xlabel("air wavelength (Angstrom)")
    ax.set_ylabel("line minus solution (Angstrom)")
    sec = ax.secondary_yaxis("right", functions=(
        lambda a: a / np.mean(wave) * SPEED_OF_LIGHT_KM_S,
        lambda v: v * np.mean(wave) / SPEED_OF_LIGHT_KM_S))
    sec.set_ylabel("km/s (at the mean wavelength)")
    ax.legend(loc="upper right", fontsize=8)
    ax.set_title(f"{title}\nrms {s1.rms_angstrom:.4f} A = {s1.rms_px:.4f} px = "
                 f"{s1.rms_km_s:.2f} km/s; shaded: +-1 rms", fontsize=9)
    return fig


def residual_map_figure(solution, *, title=""):
    """Traced points over the detector coloured by their residual (px) from the 2-D solution."""
    from matplotlib.colors import TwoSlopeNorm

    fig = _figure(10, 5)
    ax = fig.add_subplot()
    ny, nx = solution.shape
    tr = solution.traces
    yy = np.broadcast_to(tr.y_px[:, None], tr.x_px.shape)
    res = solution.residual_px
    good = solution.used & np.isfinite(res)
    bad = ~solution.used & np.isfinite(res)
    lim = max(4 * solution.rms_px, 1e-3)
    sc = ax.scatter(tr.x_px[good], yy[good], c=res[good], s=14, cmap="coolwarm",
                    norm=TwoSlopeNorm(0.0, -lim, lim), marker="s", linewidths=0)
    if bad.any():
        ax.scatter(tr.x_px[bad], yy[bad], s=22, marker="x", color="black", linewidths=0.8,
                   label=f"rejected ({bad.sum()})")
        ax.legend(loc="upper right", fontsize=8)
    ax.axhline(solution.y_ref, color="grey", lw=0.6, ls="--")
    ax.set_xlim(-0.5, nx - 0.5)
    ax.set_ylim(-0.5, ny - 0.5)
    ax.set_xlabel("pixel along the dispersion (x)")
    ax.set_ylabel("pixel along the slit (y)")
    cb = fig.colorbar(sc, ax=ax, extend="both")
    cb.set_label("measured minus solution (px)")
    ax.set_title(f"{title}\n2-D rms {solution.rms_px:.4f} px ({solution.rms_angstrom:.4f} A), "
                 f"{solution.info['n_points']} points on {solution.info['n_lines']} lines; dashed: "
                 "reference row", fontsize=9)
    return fig


def dispersion_figure(solution, *, title=""):
    """Fitted dispersion against the nominal and fitted physical models."""
    s1 = solution.solution_1d
    fig = _figure(10, 4.5)
    ax = fig.add_subplot()
    x = np.linspace(0, s1.nx - 1, 400)
    ax.plot(x, s1.nominal.dispersion(x), color=_OTHER, ls="--",
            label=f"nominal model (tilt {s1.nominal.tilt_deg:.3f} deg, f {s1.nominal.focal_length_mm:.1f} mm)")
    ax.plot(x, s1.model.dispersion(x), color="#e09f3e",
            label=f"fitted model (tilt {s1.model.tilt_deg:.3f} deg, f {s1.model.focal_length_mm:.2f} mm)")
    ax.plot(x, s1.dispersion(x), color=_USED, lw=1.5, label="solution (model + correction)")
    used = s1.lines["used"]
    xs, ws = s1.lines["x_px"][used], s1.lines["wave_angstrom"][used]
    if xs.size > 1:
        order = np.argsort(xs)
        xs, ws = xs[order], ws[order]
        ax.plot(0.5 * (xs[1:] + xs[:-1]), np.diff(ws) / np.diff(xs), "o", ms=4, color="black",
                label="between neighbouring lines")
    ax.set_xlabel("pixel along the dispersion")
    ax.set_ylabel("dispersion (Angstrom / px)")
    ax.legend(fontsize=8)
    ax.set_title(f"{title}\ncamera axis at pixel {s1.model.center_px:.2f} (nominal "
                 f"{s1.nominal.center_px:.2f})", fontsize=9)
    return fig


def write_figures(solution, flux, lines, *, title="", paths):
    """Save the four figures; ``paths`` maps 'lines', 'residuals', 'residual_map',
    'dispersion' to PNG paths (None = skip)."""
    makers = {
        "lines": lambda: arc_lines_figure(solution, flux, lines, title=title),
        "residuals": lambda: residuals_figure(solution, title=title),
        "residual_map": lambda: residual_map_figure(solution, title=title),
        "dispersion": lambda: dispersion_figure(solution, title=title),
    }
    written = []
    for key, path in paths.items():
        if not path:
            continue
        fig = makers[key]()
        Path(path).parent.mkdir(parents=True, exist_ok=True)
        fig.savefig(path)
        written.append(str(path))
    return written
