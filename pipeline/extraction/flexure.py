"""Flexure: shift of the night-sky lines against their reference wavelengths.

Between the arc and a science exposure the spectrum can move on the detector
(instrument flexure, a zero-point drift). The shift is measured on the
night-sky emission lines of the frame itself, whose air wavelengths are known
(:mod:`pipeline.extraction.skylines`), and the frame's wavelength map is corrected.

Method
------
For every line (or blend of lines closer than ``blend_fwhm`` line widths)
inside the frame's coverage, the sky pixels (objects masked) within a window
around the expected position are fitted, as a function of the wavelength the
arc solution gives each pixel, by Gaussians sharing one width and one shift
``dλ`` on a linear continuum (:func:`scipy.optimize.curve_fit`, weighted by
the pixel variances). Pixels from many rows sample the line at different
phases when lines are tilted, so the centroid is well defined. The shift of
each line is converted to detector pixels with the local dispersion; the
frame's shift is the inverse-variance weighted mean of the line shifts after
sigma clipping (:func:`astropy.stats.sigma_clip`), its error inflated by
``sqrt(chi2/dof)`` when the lines scatter more than their errors. Each line's
own error is also inflated by the ``sqrt(chi2/dof)`` of its fit when above 1
(the Gaussian is not the exact line shape: slit image times camera PSF; in
simulated 60-s frames the fits give chi2/dof ~ 1.16 and, so scaled, the line
shifts scatter 1.0-1.1 times their errors; column ``fit_chi2_dof``).

The model is one rigid shift along the dispersion: a feature that the arc
solution places at column ``x`` appears at ``x + shift_px``; the corrected map
is ``λ'(y, x) = λ(y, x - shift_px)``. The velocity is ``c * shift_px * D / λ``
evaluated at the lines used (``D`` = local dispersion, Å/px).
"""

import warnings
from dataclasses import dataclass, field

import numpy as np
from astropy.stats import sigma_clip
from astropy.table import Table
from scipy.optimize import curve_fit

from pipeline.core.errors import FlexureWarning
from pipeline.extraction.skylines import group_blends
from pipeline.core.constants import SPEED_OF_LIGHT_KM_S as C_KMS

__all__ = ["FlexureResult", "measure_flexure", "apply_flexure", "C_KMS"]

_FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))


@dataclass(frozen=True)
class FlexureResult:
    """Measured flexure of one frame.

    Attributes
    ----------
    shift_px : float
        Shift along the dispersion, pixels of the frame (+ = towards larger x).
    shift_err_px : float
        Its 1-sigma error (nan when not measured).
    shift_kms : float
        The shift as a velocity at the lines used, km/s.
    lines : astropy.table.Table
        One row per line group: ``species``, ``wavelength_ref_angstrom``,
        ``n_lines``, ``wavelength_measured_angstrom``, ``shift_angstrom``,
        ``shift_px``, ``shift_err_px``, ``shift_kms``, ``snr``, ``used``, ``status``.
    status : str
        ``ok``, ``no_lines`` (nothing measurable: shift 0) or ``disabled``.
    info : dict
        ``n_used``, ``chi2_dof``, ``dispersion_angstrom_per_px``, ``fwhm_angstrom``.
    """

    shift_px: float
    shift_err_px: float
    shift_kms: float
    lines: Table
    status: str = "ok"
    info: dict = field(default_factory=dict)


def _gauss_group(n_lines):
    def model(lam, shift, sigma, c0, c1, *amps):
        out = c0 + c1 * (lam - model.ref)
        for k in range(n_lines):
            out = out + amps[k] * np.exp(-0.5 * ((lam - model.centres[k] - shift) / sigma) ** 2)
        return out
    return model


def _empty_table():
    return Table(names=("species", "wavelength_ref_angstrom", "n_lines",
                        "wavelength_measured_angstrom", "shift_angstrom", "shift_px",
                        "shift_err_px", "shift_kms", "snr", "fit_chi2_dof", "used", "status"),
                 dtype=("U40", float, int, float, float, float, float, float, float, float, bool,
                        "U40"))


def measure_flexure(data, variance, mask, wave_map, sky_pixels, line_wave_angstrom, *,
                    line_species=None, fwhm_angstrom=None, window_fwhm=3.0,
                    max_shift_angstrom=10.0, min_snr=10.0, blend_fwhm=2.5, clip_sigma=3.0,
                    warn_shift_px=1.0):
    """Measure the flexure shift of a frame from its night-sky lines.

    Parameters
    ----------
    data : ndarray, shape (ny, nx), electron
        Calibrated frame (sky not subtracted).
    variance : ndarray, shape (ny, nx), electron^2
    mask : ndarray of uint8, shape (ny, nx)
        0 = good.
    wave_map : ndarray, shape (ny, nx), Angstrom
        Wavelength of each pixel from the arc solution.
    sky_pixels : ndarray of bool, shape (ny, nx)
        Pixels free of objects.
    line_wave_angstrom : array_like, shape (n,)
        Reference air wavelengths of the sky lines.
    line_species : sequence of str, optional
        Names for the QA table.
    fwhm_angstrom : float, optional
        Starting guess of the line FWHM; default 2.5 times the median dispersion.
    window_fwhm : float
        Half width of the fitting window beyond the outer lines of a group, in FWHM.
    max_shift_angstrom : float
        Largest shift searched; fits beyond it are rejected.
    min_snr : float
        Smallest line signal-to-noise (fitted amplitude sum over its error) used.
    blend_fwhm : float
        Lines closer than this many FWHM are fitted together.
    clip_sigma : float
        Sigma clipping of the line shifts around their weighted mean.
    warn_shift_px : float or None
        Emit :class:`~pipeline.core.errors.FlexureWarning` when ``|shift| >`` this.

    Returns
    -------
    FlexureResult
    """
    data = np.asarray(data, float)
    variance = np.asarray(variance, float)
    wave_map = np.asarray(wave_map, float)
    for name, arr in (("variance", variance), ("mask", mask), ("wave_map", wave_map),
                      ("sky_pixels", sky_pixels)):
        if np.shape(arr) != data.shape:
            raise ValueError(f"`{name}` must have the shape of `data` {data.shape}, "
                             f"got {np.shape(arr)}")
    lines = np.atleast_1d(np.asarray(line_wave_angstrom, float))
    order = np.argsort(lines)
    lines = lines[order]
    species = (np.array(["" for _ in lines]) if line_species is None
               else np.asarray(list(line_species), dtype=str)[order])
    good = (np.asarray(mask) == 0) & np.asarray(sky_pixels, bool) & np.isfinite(data) \
        & np.isfinite(variance) & (variance > 0)
    mid = wave_map[wave_map.shape[0] // 2]
    disp_row = np.gradient(mid)
    disp = float(np.median(disp_row))
    fwhm = 2.5 * disp if fwhm_angstrom is None else float(fwhm_angstrom)
    lam_good, dat_good, var_good = wave_map[good], data[good], variance[good]
    lo_cov, hi_cov = np.percentile(wave_map, [0.5, 99.5])
    table = _empty_table()
    for group in group_blends(lines, min_separation_angstrom=blend_fwhm * fwhm):
        centres = lines[group]
        name = "+".join(dict.fromkeys(species[group]))
        row = dict(species=name, wavelength_ref_angstrom=float(centres[0]),
                   n_lines=len(group), wavelength_measured_angstrom=np.nan,
                   shift_angstrom=np.nan, shift_px=np.nan, shift_err_px=np.nan,
                   shift_kms=np.nan, snr=np.nan, fit_chi2_dof=np.nan, used=False, status="")
        reach = window_fwhm * fwhm + max_shift_angstrom
        if centres[0] - reach < lo_cov or centres[-1] + reach > hi_cov:
            continue  # outside the coverage: not listed
        sel = (lam_good > centres[0] - reach) & (lam_good < centres[-1] + reach)
        if sel.sum() < 4 * (4 + len(group)):
            row["status"] = "too few sky pixels"
            table.add_row(row)
            continue
        lam, val, err = lam_good[sel], dat_good[sel], np.sqrt(var_good[sel])
        model = _gauss_group(len(group))
        model.centres = centres
        model.ref = float(centres.mean())
        cont = float(np.median(val))
        amp0 = [max(float(np.max(val)) - cont, 1.0)] * len(group)
        p0 = [0.0, fwhm / _FWHM_PER_SIGMA, cont, 0.0, *amp0]
        lower = [-max_shift_angstrom, 0.2 * disp, -np.inf, -np.inf] + [0.0] * len(group)
        upper = [max_shift_angstrom, 5.0 * fwhm, np.inf, np.inf] + [np.inf] * len(group)
        try:
            popt, pcov = curve_fit(model, lam, val, p0=p0, sigma=err, absolute_sigma=True,
                                   bounds=(lower, upper), maxfev=4000)
        except (RuntimeError, ValueError) as exc:
            row["status"] = f"fit failed: {exc}"[:60]
            table.add_row(row)
            continue
        dof = max(lam.size - len(popt), 1)
        fit_chi2 = float(np.sum(((val - model(lam, *popt)) / err) ** 2) / dof)
        row["fit_chi2_dof"] = fit_chi2
        # a Gaussian is not the exact line shape (slit image x camera PSF) and
        # unlisted faint lines sit in the windows: scale the errors by the misfit
        pcov = pcov * max(fit_chi2, 1.0)
        perr = np.sqrt(np.clip(np.diag(pcov), 0, None))
        amps = np.asarray(popt[4:])
        amp_err = float(np.sqrt(np.sum(np.diag(pcov)[4:])))
        snr = float(amps.sum() / amp_err) if amp_err > 0 else 0.0
        shift_a, shift_err_a = float(popt[0]), float(perr[0])
        local_disp = float(np.interp(centres.mean(), mid, disp_row))
        row.update(wavelength_measured_angstrom=float(centres[0] + shift_a),
                   shift_angstrom=shift_a, shift_px=shift_a / local_disp,
                   shift_err_px=shift_err_a / local_disp,
                   shift_kms=C_KMS * shift_a / float(centres.mean()), snr=snr)
        if not np.isfinite(shift_err_a) or shift_err_a <= 0:
            row["status"] = "no error estimate"
        elif snr < min_snr:
            row["status"] = f"S/N {snr:.1f} < {min_snr}"
        elif abs(abs(shift_a) - max_shift_angstrom) < 1e-6 * max_shift_angstrom:
            row["status"] = "shift at the search limit"
        else:
            row["status"] = "ok"
            row["used"] = True
        table.add_row(row)

    info = {"dispersion_angstrom_per_px": disp, "fwhm_angstrom": fwhm}
    candidates = np.asarray(table["used"], bool) if len(table) else np.zeros(0, bool)
    if not candidates.any():
        warnings.warn(f"no night-sky line measurable (of {len(table)} in the coverage); "
                      "flexure not corrected", FlexureWarning)
        info.update(n_used=0, chi2_dof=float("nan"))
        return FlexureResult(0.0, float("nan"), 0.0, table, "no_lines", info)
    shifts = np.asarray(table["shift_px"], float)
    errs = np.asarray(table["shift_err_px"], float)
    idx = np.flatnonzero(candidates)
    if idx.size >= 3:
        clipped = sigma_clip(shifts[idx], sigma=clip_sigma, maxiters=5,
                             cenfunc="median", stdfunc="mad_std")
        rejected = idx[np.ma.getmaskarray(clipped)]
        for i in rejected:
            table["used"][i] = False
            table["status"][i] = "clipped"
        idx = np.flatnonzero(np.asarray(table["used"], bool))
    w = 1.0 / errs[idx] ** 2
    shift = float(np.sum(w * shifts[idx]) / np.sum(w))
    err = float(np.sqrt(1.0 / np.sum(w)))
    chi2_dof = (float(np.sum(w * (shifts[idx] - shift) ** 2) / (idx.size - 1))
                if idx.size > 1 else float("nan"))
    if idx.size > 1 and chi2_dof > 1:
        err *= np.sqrt(chi2_dof)
    wave_used = np.asarray(table["wavelength_ref_angstrom"], float)[idx]
    disp_used = np.interp(wave_used, mid, disp_row)
    shift_kms = float(C_KMS * shift * np.mean(disp_used / wave_used))
    info.update(n_used=int(idx.size), chi2_dof=chi2_dof)
    if warn_shift_px is not None and abs(shift) > warn_shift_px:
        warnings.warn(f"flexure shift {shift:+.2f} px ({shift_kms:+.1f} km/s) exceeds the "
                      f"limit of {warn_shift_px} px", FlexureWarning)
    return FlexureResult(shift, err, shift_kms, table, "ok", info)


def apply_flexure(wave_map, shift_px):
    """Correct a wavelength map for a shift along the dispersion.

    Parameters
    ----------
    wave_map : ndarray, shape (ny, nx), Angstrom
        Arc wavelength of every pixel.
    shift_px : float
        Measured shift (features appear at ``x + shift_px``).

    Returns
    -------
    ndarray, shape (ny, nx), Angstrom
        ``λ(y, x - shift_px)``, linearly interpolated along each row and
        extrapolated with the end slopes.

    Examples
    --------
    >>> apply_flexure(np.array([[10.0, 11.0, 12.0]]), 1.0)
    array([[ 9., 10., 11.]])
    """
    wave_map = np.asarray(wave_map, float)
    if wave_map.ndim != 2 or wave_map.shape[1] < 2:
        raise ValueError(f"`wave_map` must be 2-D with nx >= 2, got shape {wave_map.shape}")
    shift = float(shift_px)
    if shift == 0.0:
        return wave_map.copy()
    nx = wave_map.shape[1]
    x = np.arange(nx, dtype=float)
    xs = x - shift
    out = np.empty_like(wave_map)
    for y in range(wave_map.shape[0]):
        row = wave_map[y]
        vals = np.interp(xs, x, row)
        left, right = xs < 0, xs > nx - 1
        vals[left] = row[0] + (row[1] - row[0]) * xs[left]
        vals[right] = row[-1] + (row[-1] - row[-2]) * (xs[right] - (nx - 1))
        out[y] = vals
    return out
