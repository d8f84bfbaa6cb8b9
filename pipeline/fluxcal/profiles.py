"""The measured spatial profile of a star along the slit, and its slit transmission.

:func:`fit_slit_profile` fits, in a few wavelength chunks of a rectified (sky-subtracted)
frame, the light of a circular Moffat seeing disc that passed the slit
(:func:`pipeline.fluxcal.slitloss.moffat_along_slit`, integrated over each pixel) to the
rows around the star's trace: FWHM and beta of the disc, wings included, with their
errors. The fit models the slit's clipping of the disc (the profile along the slit of a
clipped disc is narrower than the disc), with the star taken as centred across the slit.
:func:`profile_slit_transmission` turns that into the fraction of the star's light that
passed the slit at every wavelength: FWHM(lambda) a power law fitted over the chunks
(the configured exponent when fewer than three chunks fit), beta their median, and the
unknown centring across the slit averaged over a Gaussian of the instrument's centring
rms (:func:`pipeline.fluxcal.slitloss.centred_average`). Its relative uncertainty
combines the centring spread and the fit errors of FWHM and beta.
"""

import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from pipeline.core.checks import positive
from pipeline.core.errors import FluxCalibrationWarning
from pipeline.core.headers import header_float
from pipeline.fluxcal.slitloss import (centred_average, header_slit_fraction, moffat_along_slit,
                                       moffat_slit_transmission, profile_fwhm_arcsec)

__all__ = ["ProfileFit", "fit_slit_profile", "SlitTransmission", "profile_slit_transmission",
           "star_slit_fraction"]

#: Gauss-Legendre nodes/weights on [-1/2, 1/2] for the average over a pixel
_NODES, _WEIGHTS = np.polynomial.legendre.leggauss(4)
_NODES, _WEIGHTS = 0.5 * _NODES, 0.5 * _WEIGHTS
_BETA_RANGE = (1.5, 20.0)
#: columns used per chunk at most (evenly spaced): enough signal, bounded fitting time
_MAX_COLUMNS_PER_CHUNK = 80


@dataclass(frozen=True)
class ProfileFit:
    """Moffat fits of the profile along the slit in wavelength chunks.

    Parameters
    ----------
    wave_angstrom : ndarray, shape (k,), Angstrom
        Centre of each chunk.
    fwhm_arcsec, fwhm_err_arcsec : ndarray, shape (k,), arcsec
        FWHM of the seeing disc (before the slit) and its 1-sigma error.
    beta, beta_err : ndarray, shape (k,)
    ok : ndarray of bool, shape (k,)
        Chunks whose fit converged with enough signal.
    info : dict
        ``slit_width_arcsec``, ``arcsec_per_row``, ``n_points`` per chunk ...
    """

    wave_angstrom: np.ndarray
    fwhm_arcsec: np.ndarray
    fwhm_err_arcsec: np.ndarray
    beta: np.ndarray
    beta_err: np.ndarray
    ok: np.ndarray
    info: dict = field(default_factory=dict)


def _pixel_model(params, offsets_arcsec, pixel_arcsec, slit_width_arcsec):
    amplitude, centre, fwhm, beta, background = params
    y = (offsets_arcsec - centre)[:, None] + pixel_arcsec * _NODES[None, :]
    along = moffat_along_slit(y, fwhm, beta, slit_width_arcsec) @ _WEIGHTS
    return amplitude * along + background


def _fit_chunk(offsets, values, sigma, *, pixel_arcsec, slit_width_arcsec, fwhm_guess):
    from scipy.optimize import least_squares

    start = np.array([1.0, 0.0, fwhm_guess, 3.0, 0.0])
    lower = [0.0, -2.0 * fwhm_guess, 0.3 * fwhm_guess, _BETA_RANGE[0], -np.inf]
    upper = [np.inf, 2.0 * fwhm_guess, 4.0 * fwhm_guess, _BETA_RANGE[1], np.inf]
    # data normalised by the column sums: the amplitude is about 1 / transmission
    start[0] = 1.0 / max(float(moffat_slit_transmission(fwhm_guess, 3.0, slit_width_arcsec)),
                         1e-3)

    def residual(p):
        return (_pixel_model(p, offsets, pixel_arcsec, slit_width_arcsec) * pixel_arcsec
                - values) / sigma

    result = least_squares(residual, start, bounds=(lower, upper), x_scale="jac")
    dof = max(1, values.size - start.size)
    chi2 = float(np.sum(result.fun ** 2) / dof)
    try:
        cov = np.linalg.inv(result.jac.T @ result.jac) * max(chi2, 1.0)
        errors = np.sqrt(np.maximum(np.diag(cov), 0.0))
    except np.linalg.LinAlgError:
        errors = np.full(start.size, np.inf)
    return result, errors, chi2


def fit_slit_profile(data, variance, mask, trace_rows, wave_angstrom, *, arcsec_per_row,
                     slit_width_arcsec, fwhm_guess_arcsec, n_chunks=6, window_fwhm=4.0,
                     min_snr=20.0):
    """Fit the seeing disc of a star to its profile along the slit, chunk by chunk.

    Parameters
    ----------
    data, variance : ndarray, shape (ny, nx), electron, electron^2
        Rectified, sky-subtracted frame (rows along the slit, columns along the
        dispersion).
    mask : ndarray of uint8, shape (ny, nx)
        0 = good.
    trace_rows : ndarray, shape (nx,)
        Row of the star's centre in every column (NaN where unknown).
    wave_angstrom : ndarray, shape (nx,), Angstrom
        Wavelength of every column.
    arcsec_per_row : float, arcsec
    slit_width_arcsec : float, arcsec
    fwhm_guess_arcsec : float, arcsec
        Start value (e.g. the extraction's profile FWHM); sets the window.
    n_chunks : int
        Wavelength chunks (equal numbers of columns).
    window_fwhm : float
        Rows within this many guessed FWHM of the trace enter the fit.
    min_snr : float
        A chunk needs this total signal-to-noise ratio to be fitted.

    Returns
    -------
    ProfileFit
    """
    pixel = positive(arcsec_per_row, "arcsec_per_row")
    width = positive(slit_width_arcsec, "slit_width_arcsec")
    guess = positive(fwhm_guess_arcsec, "fwhm_guess_arcsec")
    data = np.asarray(data, dtype=float)
    ny, nx = data.shape
    trace = np.asarray(trace_rows, dtype=float)
    half = max(3.0, window_fwhm * guess / pixel)
    columns = np.flatnonzero(np.isfinite(trace))
    chunks = np.array_split(columns, max(1, int(n_chunks))) if columns.size else []
    rows = np.arange(ny)
    out = {k: [] for k in ("wave", "fwhm", "fwhm_err", "beta", "beta_err", "ok", "n", "chi2")}
    for chunk in chunks:
        offsets, values, sigmas = [], [], []
        step = max(1, len(chunk) // _MAX_COLUMNS_PER_CHUNK)
        for col in chunk[::step]:
            near = np.abs(rows - trace[col]) <= half
            good = near & (np.asarray(mask)[:, col] == 0) & np.isfinite(data[:, col]) & (
                np.asarray(variance)[:, col] > 0)
            if good.sum() < 5:
                continue
            total = data[good, col].sum()
            if not total > 0:
                continue
            offsets.append((rows[good] - trace[col]) * pixel)
            values.append(data[good, col] / total)
            sigmas.append(np.sqrt(np.asarray(variance)[good, col]) / total)
        wave = float(np.median(np.asarray(wave_angstrom)[chunk])) if len(chunk) else math.nan
        out["wave"].append(wave)
        signal = sum(float(np.sum(v)) for v in values)
        noise = math.sqrt(sum(float(np.sum(s ** 2)) for s in sigmas)) if sigmas else math.inf
        if not values or signal / noise < min_snr / math.sqrt(max(len(values), 1)):
            for key, value in (("fwhm", math.nan), ("fwhm_err", math.inf), ("beta", math.nan),
                               ("beta_err", math.inf), ("ok", False), ("n", 0),
                               ("chi2", math.nan)):
                out[key].append(value)
            continue
        offsets, values, sigmas = map(np.concatenate, (offsets, values, sigmas))
        result, errors, chi2 = _fit_chunk(offsets, values, sigmas, pixel_arcsec=pixel,
                                          slit_width_arcsec=width, fwhm_guess=guess)
        out["fwhm"].append(float(result.x[2]))
        out["fwhm_err"].append(float(errors[2]))
        out["beta"].append(float(result.x[3]))
        out["beta_err"].append(float(errors[3]))
        out["ok"].append(bool(result.success) and np.isfinite(errors[2]))
        out["n"].append(int(values.size))
        out["chi2"].append(chi2)
    return ProfileFit(np.array(out["wave"]), np.array(out["fwhm"]), np.array(out["fwhm_err"]),
                      np.array(out["beta"]), np.array(out["beta_err"]),
                      np.array(out["ok"], dtype=bool),
                      {"slit_width_arcsec": width, "arcsec_per_row": pixel,
                       "n_points": out["n"], "chi2_reduced": out["chi2"]})


@dataclass(frozen=True)
class SlitTransmission:
    """The fraction of a star's light that passed the slit, per wavelength.

    ``fraction`` (shape of the wavelengths) with ``relative_error`` (1 sigma, the same
    at every wavelength: centring spread and fit errors at the reference wavelength);
    ``fwhm_arcsec`` and ``beta`` of the disc at ``reference_wave_angstrom``;
    ``fwhm_exponent`` of FWHM(lambda); ``info`` how it was obtained.
    """

    fraction: np.ndarray
    relative_error: float
    fwhm_arcsec: float
    beta: float
    reference_wave_angstrom: float
    fwhm_exponent: float
    centring_rms_arcsec: float
    info: dict = field(default_factory=dict)


def profile_slit_transmission(fit, wave_angstrom, *, slit_width_arcsec, centring_rms_arcsec,
                              seeing_exponent=-0.2):
    """Slit transmission at every wavelength from a :class:`ProfileFit`.

    Parameters
    ----------
    fit : ProfileFit
    wave_angstrom : array_like, Angstrom
    slit_width_arcsec : float, arcsec
    centring_rms_arcsec : float, arcsec
        rms of the star's unknown offset from the slit centre, across the slit.
    seeing_exponent : float
        FWHM proportional to lambda**exponent when fewer than three chunks fit.

    Returns
    -------
    SlitTransmission

    Raises
    ------
    ValueError
        When no chunk could be fitted.
    """
    ok = fit.ok & np.isfinite(fit.fwhm_arcsec) & np.isfinite(fit.fwhm_err_arcsec)
    if not ok.any():
        raise ValueError("the star's profile along the slit could not be fitted in any "
                         "wavelength chunk (too faint?)")
    wave_k, fwhm_k = fit.wave_angstrom[ok], fit.fwhm_arcsec[ok]
    err_k = np.maximum(fit.fwhm_err_arcsec[ok], 1e-4)
    reference = float(np.median(wave_k))
    x, y, w = np.log(wave_k / reference), np.log(fwhm_k), (fwhm_k / err_k) ** 2
    if ok.sum() >= 3:
        design = np.column_stack([np.ones_like(x), x]) * np.sqrt(w)[:, None]
        (log_fwhm, exponent), *_ = np.linalg.lstsq(design, y * np.sqrt(w), rcond=None)
        how = "power law fitted over the chunks"
    else:
        exponent = float(seeing_exponent)
        log_fwhm = float(np.sum(w * (y - exponent * x)) / np.sum(w))
        how = "configured seeing exponent"
    fwhm_ref = math.exp(log_fwhm)
    fwhm_err = fwhm_ref / math.sqrt(float(np.sum(w)))
    betas, beta_errs = fit.beta[ok], fit.beta_err[ok]
    beta = float(np.median(betas))
    finite = np.isfinite(beta_errs)
    beta_err = (float(1.0 / math.sqrt(np.sum(1.0 / beta_errs[finite] ** 2)))
                if finite.any() else 1.0)
    beta_err = max(beta_err, float(np.std(betas)) / math.sqrt(betas.size))
    width = positive(slit_width_arcsec, "slit_width_arcsec")
    wave = np.asarray(wave_angstrom, dtype=float)
    fwhm = fwhm_ref * (wave / reference) ** exponent

    def through(fwhm_value, beta_value):
        return lambda offset: moffat_slit_transmission(fwhm_value, beta_value, width, offset)

    fraction, _ = centred_average(through(fwhm, beta), centring_rms_arcsec)
    at_ref, centring_spread = centred_average(through(fwhm_ref, beta), centring_rms_arcsec)
    at_ref = float(at_ref)
    d_fwhm = float(centred_average(through(fwhm_ref + fwhm_err, beta), centring_rms_arcsec)[0])
    beta_hi = min(beta + beta_err, _BETA_RANGE[1] + 10.0)
    d_beta = float(centred_average(through(fwhm_ref, beta_hi), centring_rms_arcsec)[0])
    relative_error = math.sqrt(float(centring_spread) ** 2 + (d_fwhm - at_ref) ** 2
                               + (d_beta - at_ref) ** 2) / at_ref
    if beta >= _BETA_RANGE[1] - 1e-6:
        warnings.warn(f"the profile's wings are no wider than a Gaussian's (beta at the upper "
                      f"bound {_BETA_RANGE[1]})", FluxCalibrationWarning, stacklevel=2)
    return SlitTransmission(fraction, relative_error, fwhm_ref, beta, reference, float(exponent),
                            float(centring_rms_arcsec),
                            {"how": how, "n_chunks_fitted": int(ok.sum()),
                             "fraction_at_reference": at_ref,
                             "centring_spread": float(centring_spread),
                             "fwhm_err_arcsec": fwhm_err, "beta_err": beta_err})


def star_slit_fraction(spectrum, *, model, rectified=None, trace_rows=None,
                       spatial_scale_arcsec_per_px=None, seeing_exponent=-0.2,
                       centring_rms_arcsec=0.0):
    """The slit fraction of one star's spectrum under the chosen slit-loss model.

    Parameters
    ----------
    spectrum : ExtractedSpectrum
        Its header gives SLITWID and the extraction's profile FWHM (SPATFWHM).
    model : {'gaussian', 'moffat'}
        'gaussian': a centred Gaussian disc of the header FWHM
        (:func:`pipeline.fluxcal.slitloss.header_slit_fraction`); 'moffat': the
        disc fitted to the star's measured profile on ``rectified``
        (:func:`fit_slit_profile`), averaged over the unknown centring.
    rectified : Frame, optional
        The rectified frame the spectrum was extracted from ('moffat'); rows along
        the slit with the scale CDELT2 (arcsec per row).
    trace_rows : ndarray, optional
        The spectrum's trace on that frame ('moffat').

    Returns
    -------
    fraction : ndarray, shape of the spectrum
    relative_error : float
    details : dict
        ``fwhm_arcsec``, ``fwhm_reference_angstrom``, ``slit_fraction_at_reference``,
        and for 'moffat' ``beta`` and ``centring_rms_arcsec``.
    """
    if model == "gaussian":
        fraction, fwhm, ref = header_slit_fraction(
            spectrum.header, spectrum.wave_angstrom,
            spatial_scale_arcsec_per_px=spatial_scale_arcsec_per_px,
            seeing_exponent=seeing_exponent, path=spectrum.path)
        return fraction, 0.0, {"fwhm_arcsec": fwhm, "header_fwhm_arcsec": fwhm,
                               "fwhm_reference_angstrom": ref,
                               "slit_fraction_at_reference": float(np.interp(
                                   ref, spectrum.wave_angstrom, fraction))}
    if model != "moffat":
        raise ValueError(f"unknown slit-loss model {model!r}; expected 'none', 'gaussian' or "
                         "'moffat'")
    if rectified is None or trace_rows is None:
        raise ValueError(f"{spectrum.path}: the 'moffat' slit-loss model needs the rectified "
                         "frame and the spectrum's TRACE")
    trace = np.asarray(trace_rows, dtype=float)
    if trace.shape != (rectified.data.shape[1],) or trace.shape != spectrum.wave_angstrom.shape:
        raise ValueError(f"{spectrum.path}: TRACE has {trace.size} columns, the rectified frame "
                         f"{rectified.data.shape[1]} and the spectrum "
                         f"{spectrum.wave_angstrom.size}; expected the same grid")
    width = header_float(spectrum.header, "SLITWID", path=spectrum.path, positive=True)
    per_row = abs(header_float(rectified.header, "CDELT2", path=str(spectrum.path),
                               positive=False))
    guess, _ = profile_fwhm_arcsec(spectrum.header, spectrum.wave_angstrom,
                                   spatial_scale_arcsec_per_px=spatial_scale_arcsec_per_px,
                                   path=spectrum.path)
    fit = fit_slit_profile(rectified.data, rectified.variance, rectified.mask, trace,
                           spectrum.wave_angstrom, arcsec_per_row=per_row,
                           slit_width_arcsec=width, fwhm_guess_arcsec=guess)
    through = profile_slit_transmission(fit, spectrum.wave_angstrom, slit_width_arcsec=width,
                                        centring_rms_arcsec=centring_rms_arcsec,
                                        seeing_exponent=seeing_exponent)
    return through.fraction, through.relative_error, {
        "fwhm_arcsec": through.fwhm_arcsec, "beta": through.beta, "header_fwhm_arcsec": guess,
        "fwhm_reference_angstrom": through.reference_wave_angstrom,
        "slit_fraction_at_reference": through.info["fraction_at_reference"],
        "centring_rms_arcsec": through.centring_rms_arcsec,
        "fwhm_exponent": through.fwhm_exponent}
