"""Boxcar and optimal extraction of traced objects from a rectified frame.

Optimal extraction (Horne 1986, PASP 98, 609)
--------------------------------------------
For every wavelength column ``j`` and the rows ``i`` of the aperture, the flux
is the weighted estimate

    f_j = Σ_i M_ij P_ij D_ij / V_ij  /  Σ_i M_ij P_ij² / V_ij,
    var(f_j) = 1 / Σ_i M_ij P_ij² / V_ij,

with ``D`` the sky-subtracted data, ``M`` the good-pixel mask, ``P`` the
spatial profile normalised to unit sum over the aperture, and ``V`` a
*model* variance (the variance the pixel would have if it held exactly the
model ``f P`` plus the background). Using the data's own variance instead
would bias the flux low for faint objects, because low pixels would be
weighted up.

The profile is fitted along the trace as in Marsh (1989, PASP 101, 1032):
``P`` is a smooth function of the offset from the trace centre (a cubic
B-spline in ``i - trace_j`` with breakpoints every ``profile_knot_px`` rows)
times Legendre polynomials in wavelength (order ``profile_wave_order``), fitted
to ``D_ij / f_j`` with weights ``f_j² / V_ij`` by linear least squares (with a
small curvature penalty that only matters where the offsets sample few
phases). Because the trace is tilted or curved, the pixels sample the profile
at many sub-pixel phases, and the fit follows the trace without resampling
the data. The data are normalised by the flux *smoothed along the
dispersion* (running median over ``profile_smooth_px`` columns), not by each
column's own noisy flux: the ratio ``D_ij / f_j`` with the noisy ``f_j`` of the
same column biases the profile, and with it the faint fluxes (+0.3 % at a
per-pixel S/N of 8 in our simulations, +1 % with data-based weights). A
spectral feature narrower than the smoothing changes the amplitude of a
few columns of the fit, which the normalisation of ``P`` removes.

Iterative rejection: after each estimate of ``f``, the pixel of each column
with the largest ``(D - f P)² / (V + (ε f P)²)`` is rejected if it exceeds
``reject_sigma²`` (ε = ``profile_error_fraction``, the profile model's
accuracy, protects the cores of bright stars); profile and fluxes are
refitted until nothing is rejected. Rejected pixels get the
EXTRACTION_OUTLIER bit.

Boxcar extraction: the sum of the data over ``trace ± half_width`` rows with
fractional end pixels; masked pixels are replaced by ``f P`` of the optimal
fit.

Variance model and the sky term
-------------------------------
``V_ij = B_ij + g_ij m + q_ij (m² + 2 S_ij m)``, ``m = max(f_j P_ij, 0)``, with
``B`` the noise-free variance of the background (read noise and sky photons,
resampled exactly by the rectification), ``g`` the variance per electron of
object signal (rectify weight ratio Σw²/Σw times the frame's factor ``b``) and
``q`` the flat-field term (``c Σw²/(Σw)²``) on top of the sky ``S``; ``a, b, c``
come from :func:`pipeline.extraction.sky.variance_model_coefficients`.
Without them (plain :func:`extract` calls) ``V`` is the given variance.

The sky model's own error is common to all rows at one wavelength; it is
added as a fully correlated term ``(Σ_i w_ij s_ij)²`` (``w`` the extraction
weights, ``s`` the model's standard deviation) to both extractions.

Masks of the extracted spectra: a column whose masked pixels carry more than
``max_masked_profile`` of the profile (or whose SATURATED pixels carry more
than ``max_saturated_profile``) gets the OR of their bits; columns without
any good pixel get NO_COVERAGE (flux and variance 0). Below these limits the
masked pixels are simply left out of the optimal sum (the profile accounts
for them) and replaced by the profile model in the boxcar sum.
"""

from dataclasses import dataclass, field

import numpy as np
from numpy.polynomial import legendre
from scipy.interpolate import BSpline

from pipeline.core.errors import ExtractionError
from pipeline.core.maskbits import MASK_DTYPE, MaskBit

__all__ = ["Extraction", "extract", "aperture_weights", "theoretical_variance", "FrameReduction",
           "reduce_frame", "extract_frame_file", "RECTIFICATION_DEFAULTS", "FLEXURE_DEFAULTS",
           "SKY_DEFAULTS", "TRACING_DEFAULTS", "EXTRACTION_DEFAULTS"]


@dataclass(frozen=True)
class Extraction:
    """Both extractions of one object.

    Attributes
    ----------
    flux, variance : ndarray, shape (n,), electron, electron^2
        Optimal extraction.
    mask : ndarray of uint8, shape (n,)
    boxcar_flux, boxcar_variance : ndarray, shape (n,)
    boxcar_mask : ndarray of uint8, shape (n,)
    sky : ndarray, shape (n,), electron
        Sky model summed over the boxcar aperture (zeros if none given).
    trace_px : ndarray, shape (n,)
    profile : ndarray, shape (ny, n)
        Normalised spatial profile (0 outside the aperture).
    rejected : ndarray of bool, shape (ny, n)
    info : dict
        ``half_width_px``, ``n_rejected``, ``n_iterations``, ``snr_median``,
        ``variance_sky_term`` (median fraction of the optimal variance due to
        the sky model), ``profile_chi2_dof``.
    """

    flux: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    boxcar_flux: np.ndarray
    boxcar_variance: np.ndarray
    boxcar_mask: np.ndarray
    sky: np.ndarray
    trace_px: np.ndarray
    profile: np.ndarray = field(repr=False)
    rejected: np.ndarray = field(repr=False)
    info: dict = field(default_factory=dict)


def aperture_weights(trace_px, ny, half_width_px):
    """Fraction of every pixel inside ``trace ± half_width`` (rows).

    Returns
    -------
    ndarray, shape (ny, n)
        Pixel ``i`` covers ``i - 0.5 .. i + 0.5``.

    Examples
    --------
    >>> aperture_weights(np.array([2.0]), 5, 1.0)[:, 0]
    array([0. , 0.5, 1. , 0.5, 0. ])
    """
    t = np.asarray(trace_px, float)[None, :]
    rows = np.arange(ny, dtype=float)[:, None]
    lo = np.maximum(rows - 0.5, t - half_width_px)
    hi = np.minimum(rows + 0.5, t + half_width_px)
    return np.clip(hi - lo, 0.0, 1.0)


def theoretical_variance(profile, variance, *, good=None):
    """Smallest variance of a flux estimate for a known profile: 1 / Σ P² / V.

    Parameters
    ----------
    profile : ndarray, shape (ny, n)
        True profile, normalised to unit sum per column.
    variance : ndarray, shape (ny, n)
        True (expected) pixel variances.
    good : ndarray of bool, optional
        Pixels available.
    """
    p = np.asarray(profile, float)
    v = np.asarray(variance, float)
    g = np.ones(p.shape, bool) if good is None else np.asarray(good, bool)
    with np.errstate(divide="ignore", invalid="ignore"):
        s = np.sum(np.where(g & (v > 0), p ** 2 / v, 0.0), axis=0)
        return np.where(s > 0, 1.0 / s, np.inf)


def _profile_basis(offset, wave_u, half_px, knot_px, wave_order):
    """Sparse design of P(offset, wave): cubic B-splines in offset x Legendre in wave.

    Columns are interleaved ``j * (wave_order + 1) + k``; each row has 4 x
    (wave_order + 1) nonzero entries.
    """
    from scipy import sparse

    lo, hi = -half_px - 0.5, half_px + 0.5
    n_int = max(int(np.ceil((hi - lo) / knot_px)), 1)
    bp = np.linspace(lo, hi, n_int + 1)
    knots = np.concatenate([[lo] * 3, bp, [hi] * 3])
    b = BSpline.design_matrix(np.clip(offset, lo, hi), knots, 3)
    n_pts = offset.size
    bcols = np.asarray(b.indices).reshape(n_pts, 4)  # scipy stores k + 1 entries per row
    bvals = np.asarray(b.data).reshape(n_pts, 4)
    kk = wave_order + 1
    leg = legendre.legvander(wave_u, wave_order)
    cols = (bcols[:, :, None] * kk + np.arange(kk)[None, None, :]).reshape(n_pts, -1)
    vals = (bvals[:, :, None] * leg[:, None, :]).reshape(n_pts, -1)
    rows = np.repeat(np.arange(n_pts), cols.shape[1])
    basis = sparse.csr_matrix((vals.ravel(), (rows, cols.ravel())),
                              shape=(n_pts, b.shape[1] * kk))
    return basis, b.shape[1], kk


def _penalty(n_spline, n_wave, strength):
    """Second differences of the spline coefficients, per Legendre term."""
    if n_spline < 3:
        return np.zeros((0, n_spline * n_wave))
    d2 = np.diff(np.eye(n_spline), 2, axis=0)
    rows = []
    for k in range(n_wave):
        r = np.zeros((d2.shape[0], n_spline * n_wave))
        r[:, k::n_wave] = d2
        rows.append(r)
    return strength * np.vstack(rows)


def _fit_profile(data, var, good, inap, offset, wave_u, flux, half_px, knot_px, wave_order):
    """Fit P(offset, wave) to data / flux; return the normalised profile (ny, n)."""
    col = np.broadcast_to(np.arange(data.shape[1])[None, :], data.shape)
    sel = inap & good & (flux[None, :] > 0)
    if sel.sum() < 10:
        raise ExtractionError("fewer than 10 good pixels with positive flux to fit the profile")
    f = flux[col[sel]]
    y = data[sel] / f
    w = np.sqrt(f ** 2 / var[sel])
    basis, n_s, n_w = _profile_basis(offset[sel], wave_u[col[sel]], half_px, knot_px, wave_order)
    a = basis.multiply(w[:, None]).tocsr()
    rhs = y * w
    gram = (a.T @ a).toarray()
    scale = np.sqrt(np.mean(np.diag(gram)))
    pen = _penalty(n_s, n_w, 1e-3 * scale)
    # regularised normal equations (the curvature penalty keeps them positive definite)
    normal = gram + pen.T @ pen
    normal[np.diag_indices_from(normal)] += 1e-12 * np.trace(normal) / normal.shape[0]
    try:
        coef = np.linalg.solve(normal, a.T @ rhs)
    except np.linalg.LinAlgError:
        coef, *_ = np.linalg.lstsq(np.vstack([a.toarray(), pen]),
                                   np.concatenate([rhs, np.zeros(pen.shape[0])]), rcond=None)
    chi2 = float(np.sum((a @ coef - rhs) ** 2) / max(sel.sum() - coef.size, 1))
    basis_all, _, _ = _profile_basis(offset[inap], wave_u[col[inap]], half_px, knot_px,
                                     wave_order)
    prof = np.zeros(data.shape)
    prof[inap] = basis_all @ coef  # not clipped at 0: clipping noisy wings biases faint fluxes
    norm = prof.sum(axis=0)
    prof = np.where(norm[None, :] > 0, prof / np.where(norm > 0, norm, 1.0)[None, :], 0.0)
    return prof, chi2


def _smooth_flux(flux, width):
    """Running median along the dispersion (the profile's normalisation)."""
    from scipy.ndimage import median_filter

    if width <= 1 or flux.size < 3:
        return flux
    return median_filter(flux, size=min(int(width) | 1, flux.size - (1 - flux.size % 2)),
                         mode="nearest")


def extract(data, variance, mask, trace_px, *, half_width_px, background_variance=None,
            signal_variance_factor=None, signal_variance_quadratic=None, sky=None,
            sky_variance=None, profile_knot_px=0.5,
            profile_wave_order=2, profile_smooth_px=31, reject_sigma=5.0, max_iterations=20,
            profile_error_fraction=0.02, max_masked_profile=0.5, max_saturated_profile=0.05):
    """Boxcar and optimal extraction of one object.

    Parameters
    ----------
    data : ndarray, shape (ny, n), electron
        Rectified, sky-subtracted frame.
    variance : ndarray, shape (ny, n), electron^2
        Pixel variances (used for the weights when no variance model is given).
    mask : ndarray of uint8, shape (ny, n)
    trace_px : ndarray, shape (n,)
        Trace centre of each column, rows.
    half_width_px : float
        Aperture half width, rows (boxcar sum and optimal-extraction window).
    background_variance : ndarray, shape (ny, n), optional
        Noise-free variance of the background of every pixel, electron^2.
    signal_variance_factor : ndarray or float, optional
        Variance per electron of object signal; with ``background_variance``
        it defines the model variance (see module notes).
    signal_variance_quadratic : ndarray or float, optional
        Flat-field term: the model variance gains ``q * (m**2 + 2 * sky * m)``
        for object signal ``m`` on top of ``sky`` (0 if not given).
    sky : ndarray, shape (ny, n), optional
        Sky model (for the SKY spectrum of the product).
    sky_variance : ndarray, shape (ny, n), optional
        Variance of the sky model, electron^2 (added as a correlated term).
        When given, it is assumed included in ``variance`` and is taken out of
        the per-pixel part.
    profile_knot_px : float
        Breakpoint spacing of the profile spline, rows.
    profile_wave_order : int
        Order of the profile's variation with wavelength.
    profile_smooth_px : int
        Running-median width (columns) of the flux that normalises the data
        in the profile fit.
    reject_sigma : float
        Rejection threshold of deviant pixels.
    max_iterations : int
        Largest number of rejection iterations.
    profile_error_fraction : float
        Relative accuracy of the profile model, used in the rejection only.
    max_masked_profile : float
        Columns whose masked pixels carry more of the profile are flagged.
    max_saturated_profile : float
        Columns whose SATURATED pixels carry more of the profile are flagged
        (stricter: a saturated core rebuilt from the wings is off by percents).

    Returns
    -------
    Extraction

    Raises
    ------
    ExtractionError
        When the aperture holds too few good pixels to fit a profile.

    Examples
    --------
    >>> y = np.arange(21.0)[:, None]
    >>> prof = np.exp(-0.5 * ((y - 10) / 1.5) ** 2) * np.ones((1, 50))
    >>> prof /= prof.sum(axis=0)
    >>> ex = extract(1000 * prof, np.full(prof.shape, 1.0), np.zeros(prof.shape, 'u1'),
    ...              np.full(50, 10.0), half_width_px=7)
    >>> bool(np.allclose(ex.flux, 1000, rtol=1e-3))
    True
    """
    data = np.asarray(data, float)
    variance = np.asarray(variance, float)
    mask = np.asarray(mask, dtype=MASK_DTYPE)
    ny, n = data.shape
    for name, arr in (("variance", variance), ("mask", mask)):
        if arr.shape != data.shape:
            raise ValueError(f"`{name}` must have the shape of `data` {data.shape}, got {arr.shape}")
    trace = np.asarray(trace_px, float)
    if trace.shape != (n,):
        raise ValueError(f"`trace_px` must have shape ({n},), got {trace.shape}")
    if not half_width_px > 0:
        raise ValueError(f"`half_width_px` must be > 0, got {half_width_px!r}")
    sky_var = np.zeros(data.shape) if sky_variance is None else np.asarray(sky_variance, float)
    sky_err = np.sqrt(np.clip(sky_var, 0.0, None))
    pix_var = np.clip(variance - sky_var, 0.0, None)
    use_model = background_variance is not None and signal_variance_factor is not None
    if use_model:
        bkg = np.asarray(background_variance, float)
        gfac = np.broadcast_to(np.asarray(signal_variance_factor, float), data.shape)
        qfac = np.broadcast_to(np.asarray(0.0 if signal_variance_quadratic is None
                                          else signal_variance_quadratic, float), data.shape)
        sky_level = (np.zeros(data.shape) if sky is None
                     else np.clip(np.asarray(sky, float), 0.0, None))

    rows = np.arange(ny, dtype=float)[:, None]
    offset = np.broadcast_to(rows - trace[None, :], data.shape)
    inap = np.abs(offset) <= half_width_px
    boxw = aperture_weights(trace, ny, half_width_px)
    good0 = (mask == 0) & np.isfinite(data) & np.isfinite(variance) & (variance > 0)
    wave_u = np.linspace(-1.0, 1.0, n) if n > 1 else np.zeros(1)
    rejected = np.zeros(data.shape, bool)

    # starting flux: boxcar of the good pixels, scaled for the masked ones
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.sum(boxw * good0, axis=0) / np.sum(boxw, axis=0)
        flux = np.where(frac > 0, np.sum(np.where(good0, boxw * data, 0.0), axis=0) / frac, 0.0)
    n_iter = 0
    prof = None
    chi2 = float("nan")

    def noise_free(f_col):
        m = np.clip(f_col[None, :] * prof, 0.0, None)
        v = bkg + gfac * m + qfac * (m * m + 2.0 * sky_level * m)
        return np.where(v > 0, v, np.inf)

    for n_iter in range(1, max_iterations + 1):
        good = good0 & ~rejected
        f_smooth = np.clip(_smooth_flux(flux, profile_smooth_px), 0.0, None)
        if not use_model:
            var_fit = np.where(pix_var > 0, pix_var, np.inf)
        elif prof is None:  # first pass only: no profile yet
            m0 = np.clip(data, 0.0, None)
            v0 = bkg + gfac * m0 + qfac * (m0 * m0 + 2.0 * sky_level * m0)
            var_fit = np.where(v0 > 0, v0, np.inf)
        else:
            var_fit = noise_free(f_smooth)
        prof, chi2 = _fit_profile(data, var_fit, good, inap, offset, wave_u, f_smooth,
                                  half_width_px, profile_knot_px, profile_wave_order)
        # weights: variance model from the smoothed flux (independent of each pixel's noise)
        var_w = noise_free(f_smooth) if use_model else var_fit
        num = np.sum(np.where(good & inap, prof * data / var_w, 0.0), axis=0)
        den = np.sum(np.where(good & inap, prof ** 2 / var_w, 0.0), axis=0)
        flux = np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)
        if n_iter == 1:
            continue  # the first profile was fitted with data-based weights: refit first
        var_r = noise_free(flux) if use_model else var_fit
        model = flux[None, :] * prof
        z2 = np.where(good & inap, (data - model) ** 2
                      / (var_r + (profile_error_fraction * model) ** 2), 0.0)
        worst = np.argmax(z2, axis=0)
        worst_z2 = z2[worst, np.arange(n)]
        new = worst_z2 > reject_sigma ** 2
        if not new.any():
            break
        rejected[worst[new], np.flatnonzero(new)] = True

    good = good0 & ~rejected
    use = good & inap
    den = np.sum(np.where(use, prof ** 2 / var_w, 0.0), axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        weights = np.where(use, prof / var_w, 0.0) / np.where(den > 0, den, np.inf)[None, :]
    flux = np.sum(np.where(use, weights * data, 0.0), axis=0)
    var_r = noise_free(flux) if use_model else var_w
    var_pix = np.sum(np.where(use, weights ** 2 * np.where(np.isfinite(var_r), var_r, 0.0), 0.0),
                     axis=0)
    var_sky = np.sum(weights * sky_err, axis=0) ** 2
    opt_var = var_pix + var_sky

    # boxcar with masked pixels replaced by the profile model
    model = flux[None, :] * prof
    filled = np.where(good, data, model)
    box_flux = np.sum(boxw * filled, axis=0)
    box_pix_var = var_r if use_model else np.where(np.isfinite(pix_var), pix_var, 0.0)
    box_pix_var = np.where(np.isfinite(box_pix_var), box_pix_var, 0.0)
    box_var = np.sum(boxw ** 2 * box_pix_var, axis=0) + np.sum(boxw * sky_err, axis=0) ** 2
    sky_sum = (np.zeros(n) if sky is None else np.sum(boxw * np.asarray(sky, float), axis=0))

    # masks of the spectra
    bad_bits = np.where(~good, mask | np.where(rejected, MASK_DTYPE(MaskBit.EXTRACTION_OUTLIER),
                                               MASK_DTYPE(0)), MASK_DTYPE(0)).astype(MASK_DTYPE)
    pos = np.clip(prof, 0.0, None)
    masked_prof = np.sum(np.where(inap & ~good, pos, 0.0), axis=0) / np.maximum(
        np.sum(np.where(inap, pos, 0.0), axis=0), 1e-30)
    masked_box = np.sum(np.where(~good, boxw * pos, 0.0), axis=0) / np.maximum(
        np.sum(boxw * pos, axis=0), 1e-30)
    bits_opt = np.bitwise_or.reduce(np.where(inap, bad_bits, 0).astype(MASK_DTYPE), axis=0)
    bits_box = np.bitwise_or.reduce(np.where(boxw > 0, bad_bits, 0).astype(MASK_DTYPE), axis=0)
    sat = (mask & MASK_DTYPE(MaskBit.SATURATED)) != 0
    sat_prof = np.sum(np.where(inap & sat, pos, 0.0), axis=0) / np.maximum(
        np.sum(np.where(inap, pos, 0.0), axis=0), 1e-30)
    flag = (masked_prof > max_masked_profile) | (sat_prof > max_saturated_profile)
    opt_mask = np.where(flag, bits_opt, 0).astype(MASK_DTYPE)
    box_mask = np.where(flag | (masked_box > max_masked_profile), bits_box, 0).astype(MASK_DTYPE)
    empty = np.sum(use, axis=0) == 0
    for arr in (flux, opt_var, box_flux, box_var):
        arr[empty] = 0.0
    opt_mask[empty] |= bits_opt[empty] | MASK_DTYPE(MaskBit.NO_COVERAGE)
    box_mask[empty] |= bits_box[empty] | MASK_DTYPE(MaskBit.NO_COVERAGE)
    ok = (opt_mask == 0) & (opt_var > 0)
    snr = float(np.median(flux[ok] / np.sqrt(opt_var[ok]))) if ok.any() else 0.0
    info = {
        "half_width_px": float(half_width_px),
        "n_rejected": int(rejected.sum()),
        "n_iterations": n_iter,
        "snr_median": snr,
        "variance_sky_term": float(np.median(var_sky[ok] / opt_var[ok])) if ok.any() else 0.0,
        "variance_pixels": var_pix,
        "profile_chi2_dof": chi2,
        "model_variance": bool(use_model),
    }
    return Extraction(flux, opt_var, opt_mask, box_flux, box_var, box_mask, sky_sum, trace,
                      prof, rejected, info)


# =============================================================================== one frame
#: Defaults of the config sections (the same values as config/schema.yaml).
RECTIFICATION_DEFAULTS = {"wavelength_grid": "linear", "step_angstrom": None,
                          "velocity_step_kms": None, "start_angstrom": None,
                          "end_angstrom": None}
FLEXURE_DEFAULTS = {"enabled": True, "line_list": None, "use_unverified_lines": False,
                    "window_fwhm": 3.0, "max_shift_angstrom": 10.0, "min_line_snr": 10.0,
                    "blend_fwhm": 2.5, "warn_shift_px": 1.0}
SKY_DEFAULTS = {"knot_spacing_px": 0.6, "spatial_order": 0, "fit_illumination": True,
                "reject_sigma": 5.0, "max_iterations": 8, "object_snr_min": 5.0,
                "object_pad_fwhm": 1.5}
TRACING_DEFAULTS = {"fwhm_guess_arcsec": 1.2, "snr_min": 5.0, "max_objects": 5,
                    "own_trace_snr": 30.0, "n_bins": 24, "order": 3, "reject_sigma": 3.0,
                    "min_bin_snr": 5.0, "use_standard_reference": True}
EXTRACTION_DEFAULTS = {"aperture_fwhm": 1.5, "min_half_width_px": 3.0, "profile_knot_px": 0.5,
                       "profile_wave_order": 2, "profile_smooth_px": 31, "reject_sigma": 5.0,
                       "max_iterations": 20, "profile_error_fraction": 0.02,
                       "max_masked_profile": 0.5, "max_saturated_profile": 0.05}


def _options(given, defaults, section):
    """Fill a config section with its defaults; unknown keys are a ConfigError."""
    from pipeline.core.errors import ConfigError

    given = dict(given or {})
    unknown = sorted(set(given) - set(defaults))
    if unknown:
        raise ConfigError(f"{section}: unknown option(s) {unknown}; known: {sorted(defaults)}")
    out = dict(defaults)
    out.update(given)
    return out


@dataclass(frozen=True)
class FrameReduction:
    """Everything the 2-D to 1-D reduction of one frame produced.

    Attributes
    ----------
    rectified : pipeline.extraction.rectify.RectifiedFrame
        Sky-subtracted frame on the wavelength grid.
    sky : ndarray, shape (ny, n_pix), electron
        Rectified sky model.
    sky_variance : ndarray, shape (ny, n_pix), electron^2
        Variance of the sky model (correlated along the slit).
    background_variance : ndarray, shape (ny, n_pix), electron^2
        Noise-free variance of read noise and sky photons.
    signal_variance_factor : ndarray, shape (ny, n_pix)
        Variance per electron of object signal.
    signal_variance_quadratic : ndarray, shape (ny, n_pix)
        Flat-field variance term (see :func:`extract`).
    sky_region : ndarray of bool, shape (ny, n_pix)
        Pixels used as sky (objects masked).
    wave_map : ndarray, shape (ny, nx), Angstrom
        Flexure-corrected wavelength map of the native frame.
    flexure : pipeline.extraction.flexure.FlexureResult
    sky_info : dict
    traces : list of pipeline.extraction.trace.Trace
        Aperture 1 first.
    half_widths_px : list of float
    extractions : list of Extraction
    """

    rectified: object
    sky: np.ndarray
    sky_variance: np.ndarray
    background_variance: np.ndarray
    signal_variance_factor: np.ndarray
    signal_variance_quadratic: np.ndarray
    sky_region: np.ndarray
    wave_map: np.ndarray
    flexure: object
    sky_info: dict
    traces: list
    half_widths_px: list
    extractions: list


def _half_widths(traces, *, aperture_fwhm, min_half_width_px):
    import warnings

    from pipeline.extraction.trace import TracingWarning

    half = [max(aperture_fwhm * t.fwhm_px, min_half_width_px) for t in traces]
    for i, t in enumerate(traces):
        for j, u in enumerate(traces):
            if i == j:
                continue
            gap = abs(t.centre_px - u.centre_px)
            if half[i] > 0.5 * gap:
                warnings.warn(f"aperture {i + 1} narrowed from {half[i]:.1f} to {0.5 * gap:.1f} "
                              f"rows: aperture {j + 1} is {gap:.1f} rows away", TracingWarning)
                half[i] = max(0.5 * gap, 1.0)
    return half


def reduce_frame(data, variance, mask, wave_map, *, line_wave_angstrom=(), line_species=None,
                 spatial_scale_arcsec_per_px=0.4, reference_trace=None, reference_name="",
                 rectification=None, flexure=None, sky=None, tracing=None, extraction=None):
    """Rectify, correct flexure, subtract the sky, trace and extract one frame.

    Parameters
    ----------
    data : ndarray, shape (ny, nx), electron
        Calibrated frame in canonical orientation.
    variance : ndarray, shape (ny, nx), electron^2
    mask : ndarray of uint8, shape (ny, nx)
    wave_map : ndarray, shape (ny, nx), Angstrom
        Wavelength of every pixel from the arc solution.
    line_wave_angstrom : array_like
        Night-sky line wavelengths (air) for the flexure.
    line_species : sequence of str, optional
    spatial_scale_arcsec_per_px : float
        Slit scale of one (binned) row.
    reference_trace : pipeline.extraction.trace.Trace, optional
        Bright reference whose shape faint objects borrow.
    reference_name : str
    rectification, flexure, sky, tracing, extraction : dict, optional
        Options of the config sections (defaults: ``*_DEFAULTS`` of this module).

    Returns
    -------
    FrameReduction

    Notes
    -----
    Order of the steps: objects are found on the native frame and masked; the
    sky is fitted on the native pixels (:func:`pipeline.extraction.sky.fit_sky`); the
    flexure is measured on the sky pixels against the night-sky lines and the
    wavelength map corrected (the sky subtraction itself does not depend on
    it: the sky model is a function of the arc wavelengths); the
    sky-subtracted frame, the sky model and the variance models are rectified
    with the same weights; objects are traced and extracted on the rectified
    frame.
    """
    from pipeline.extraction import flexure as flx
    from pipeline.extraction import rectify as rct
    from pipeline.extraction import sky as sky_mod
    from pipeline.extraction import trace as trc

    ro = _options(rectification, RECTIFICATION_DEFAULTS, "rectification")
    fo = _options(flexure, FLEXURE_DEFAULTS, "flexure")
    so = _options(sky, SKY_DEFAULTS, "sky")
    to = _options(tracing, TRACING_DEFAULTS, "tracing")
    eo = _options(extraction, EXTRACTION_DEFAULTS, "extraction")
    if ro["wavelength_grid"] not in ("linear", "log"):
        from pipeline.core.errors import ConfigError
        raise ConfigError(f"rectification.wavelength_grid = {ro['wavelength_grid']!r}; "
                          "expected 'linear' or 'log'")
    data = np.asarray(data, float)
    variance = np.asarray(variance, float)
    mask = np.asarray(mask, dtype=MASK_DTYPE)
    wave_map = np.asarray(wave_map, float)
    for name, arr in (("variance", variance), ("mask", mask), ("wave_map", wave_map)):
        if arr.shape != data.shape:
            raise ValueError(f"`{name}` must have the shape of `data` {data.shape}, "
                             f"got {arr.shape}")
    fwhm_px = to["fwhm_guess_arcsec"] / spatial_scale_arcsec_per_px

    sky_pixels, _ = trc.object_mask(data, variance, mask, wave_map, fwhm_guess_px=fwhm_px,
                                    snr_min=so["object_snr_min"], pad_fwhm=so["object_pad_fwhm"],
                                    max_objects=to["max_objects"])
    # variance = a + b * signal over all good pixels (objects give the slope its lever arm)
    var_coef = sky_mod.variance_model_coefficients(data, variance, mask)
    model = sky_mod.fit_sky(data, variance, mask, wave_map, sky_pixels,
                            variance_coefficients=var_coef,
                            knot_spacing_px=so["knot_spacing_px"],
                            spatial_order=so["spatial_order"],
                            fit_illumination=so["fit_illumination"],
                            reject_sigma=so["reject_sigma"], max_iterations=so["max_iterations"])
    lines = np.atleast_1d(np.asarray(line_wave_angstrom, float))
    if fo["enabled"] and lines.size:
        flex = flx.measure_flexure(data, variance, mask, wave_map, sky_pixels & ~model.rejected,
                                   lines, line_species=line_species,
                                   window_fwhm=fo["window_fwhm"],
                                   max_shift_angstrom=fo["max_shift_angstrom"],
                                   min_snr=fo["min_line_snr"], blend_fwhm=fo["blend_fwhm"],
                                   warn_shift_px=fo["warn_shift_px"])
    else:
        from astropy.table import Table
        flex = flx.FlexureResult(0.0, float("nan"), 0.0, Table(), "disabled", {})
    wave_corr = flx.apply_flexure(wave_map, flex.shift_px)
    d_ss, v_ss, m_ss = sky_mod.subtract_sky(data, variance, mask, model)

    grid = rct.wavelength_grid(wave_corr, step_angstrom=ro["step_angstrom"],
                               start_angstrom=ro["start_angstrom"],
                               end_angstrom=ro["end_angstrom"],
                               log=ro["wavelength_grid"] == "log",
                               velocity_step_kms=ro["velocity_step_kms"])
    rect = rct.rectify(d_ss, v_ss, m_ss, wave_corr, grid)
    wts = rect.weights
    sky_r = rct.resample_rows(model.sky, wts)
    sky_err_r = rct.resample_rows(np.sqrt(model.sky_variance), wts)  # fully correlated locally
    bkg_r = rct.resample_rows(model.background_variance, wts, power=2)
    wsum = wts.weight_sum
    _, b_coef, _ = model.info["variance_coefficients"]
    safe = np.where(wsum > 0, wsum, 1.0)
    gfac = b_coef * np.where(wsum > 0, wts.weight_sq_sum / safe, 0.0)
    # flat-field term per column (the flat's relative error changes along the dispersion);
    # the rectified pixel's term is the weighted mean of c over its input pixels
    c_col = sky_mod.flat_term_by_column(data, variance, mask, var_coef)
    c_r = rct.resample_rows(np.broadcast_to(c_col[None, :], data.shape), wts) / safe
    qfac = c_r * np.where(wsum > 0, wts.weight_sq_sum / safe ** 2, 0.0)
    sky_region = rct.resample_rows(sky_pixels.astype(float), wts) > 0.5 * wsum
    for arr in (sky_r, sky_err_r, bkg_r, gfac, qfac):
        arr[~wts.covered] = 0.0

    wave_grid = grid.centres_angstrom()
    traces = trc.trace_frame(rect.data, rect.variance, rect.mask, wave_grid,
                             fwhm_guess_px=fwhm_px, snr_min=to["snr_min"],
                             max_objects=to["max_objects"], own_trace_snr=to["own_trace_snr"],
                             n_bins=to["n_bins"], order=to["order"],
                             reject_sigma=to["reject_sigma"], min_bin_snr=to["min_bin_snr"],
                             reference=reference_trace if to["use_standard_reference"] else None,
                             reference_name=reference_name)
    half = _half_widths(traces, aperture_fwhm=eo["aperture_fwhm"],
                        min_half_width_px=eo["min_half_width_px"])
    extractions = []
    for tr, h in zip(traces, half):
        extractions.append(extract(
            rect.data, rect.variance, rect.mask, tr.position_px(wave_grid), half_width_px=h,
            background_variance=bkg_r, signal_variance_factor=gfac,
            signal_variance_quadratic=qfac, sky=sky_r,
            sky_variance=sky_err_r ** 2, profile_knot_px=eo["profile_knot_px"],
            profile_wave_order=eo["profile_wave_order"],
            profile_smooth_px=eo["profile_smooth_px"], reject_sigma=eo["reject_sigma"],
            max_iterations=eo["max_iterations"],
            profile_error_fraction=eo["profile_error_fraction"],
            max_masked_profile=eo["max_masked_profile"],
            max_saturated_profile=eo["max_saturated_profile"]))
    return FrameReduction(rect, sky_r, sky_err_r ** 2, bkg_r, gfac, qfac, sky_region, wave_corr,
                          flex, model.info, traces, half, extractions)


# =============================================================================== FITS adapter
#: storage keywords of the calibrated frame, never copied into products
_NOT_COPIED = ("SIMPLE", "BITPIX", "NAXIS", "NAXIS1", "NAXIS2", "EXTEND", "BZERO", "BSCALE",
               "BLANK", "CHECKSUM", "DATASUM", "BUNIT", "EXTNAME", "PCOUNT", "GCOUNT",
               "XTENSION")


def _product_header(header):
    """Observation keywords of the calibrated frame, without structure, WCS or provenance.

    Pixel-grid keywords (any WCS convention, axis-indexed families, pixel sections) are
    dropped by the generic rule of :func:`pipeline.core.headers.is_raw_geometry_keyword`."""
    from astropy.io import fits

    from pipeline.core.headers import is_raw_geometry_keyword

    present = set(header.keys())
    out = fits.Header()
    for card in header.cards:
        key = card.keyword
        if (not key or key in _NOT_COPIED or key in ("COMMENT", "HISTORY", "")
                or is_raw_geometry_keyword(key, card.value, header_keywords=present)
                or (key[:5] in ("INPUT", "CALIB") and key[5:].isdigit())
                or key in ("PIPEVERS", "PIPESTEP", "CFGHASH", "DATE")):
            continue
        out.append(card)
    return out


def _read_map(path):
    from pipeline.core.errors import InputFileError

    try:
        from pipeline.wavelength.solve import load_wavelength_map
    except ImportError:
        load_wavelength_map = None
    if load_wavelength_map is not None:
        return np.asarray(load_wavelength_map(path).wave_angstrom, float)
    from astropy.io import fits
    try:
        with fits.open(path, memmap=False) as hdul:
            data = hdul[0].data
    except OSError as exc:
        raise InputFileError(path, f"cannot be read as FITS ({exc})") from exc
    if data is None or np.ndim(data) != 2:
        raise InputFileError(path, "PRIMARY HDU must hold the 2-D wavelength map lambda(y, x)")
    return np.asarray(data, float)


def _reference_from_table(path):
    """Aperture 1 of a standard's trace table, if traced on its own."""
    from astropy.table import Table

    from pipeline.core.errors import InputFileError, InputFileWarning
    from pipeline.extraction.trace import traces_from_table

    import warnings
    try:
        table = Table.read(path, format="ascii.ecsv")
    except (OSError, ValueError) as exc:
        raise InputFileError(path, f"cannot be read as an ECSV trace table ({exc})") from exc
    traces = traces_from_table(table)
    own = [t for t in traces if t.mode == "own"]
    if not own:
        warnings.warn(f"{path}: no trace fitted on its own; faint objects keep a fixed row",
                      InputFileWarning)
        return None, ""
    name = str(table["frame_id"][0]) if len(table) else ""
    return own[0], name


def _as_path_or_none(value):
    if value is None:
        return None
    if isinstance(value, (list, tuple)):
        value = value[0] if value else None
    return None if value in (None, "") else str(value)


def extract_frame_file(*, frame, wavelength, rectified, flexure_table, traces, spectra,
                       qa_rectified, qa_spectra, frame_id, frame_type, setup,
                       spatial_scale_arcsec_per_px, reference=None, sky_lines=None,
                       rectification=None, flexure=None, sky=None, tracing=None,
                       extraction=None):
    """Adapter of the ``extract_spectra`` rule: one calibrated frame to its 1-D products.

    Parameters
    ----------
    frame : str
        Calibrated frame (``calibrated/{frame}.fits``).
    wavelength : str
        Wavelength solution of the nearest arc (PRIMARY = dense λ(y, x) map).
    reference : str, optional
        Trace table of the setup's standard star (its aperture 1 gives the
        shape that faint objects borrow).
    sky_lines : str, optional
        Night-sky line table (a rule input, so that editing it reruns the step);
        overrides ``flexure['line_list']``.
    rectified : str
        Output: rectified, sky-subtracted frame (frames layout + SKY, SKYVAR,
        BKGVAR, SIGVARF, SIGVARQ, SKYREG extensions; FITS WCS AWAV x SLITPOS).
    flexure_table, traces : str
        Outputs: ECSV tables of the flexure lines and of the traces.
    spectra : str
        Output folder: one 1-D FITS per object (:mod:`pipeline.core.spectra`) and
        ``extraction.ecsv``.
    qa_rectified, qa_spectra : str
        Output PNGs.
    frame_id, frame_type, setup : str
        From the night inventory.
    spatial_scale_arcsec_per_px : float
        Unbinned slit scale (config instrument); multiplied by BINSPAT.
    rectification, flexure, sky, tracing, extraction : dict
        Config sections.
    """
    import warnings
    from pathlib import Path

    from astropy.io import fits
    from astropy.table import Table

    from pipeline.core import provenance
    from pipeline.extraction import skylines
    from pipeline.core.errors import InputFileError, InputFileWarning
    from pipeline.core.frames import Frame, read_frame, write_frame
    from pipeline.extraction.qa import plot_rectified_frame, plot_spectra
    from pipeline.extraction.rectify import slit_wcs_cards
    from pipeline.core.spectra import LISTING_COLUMNS, sanitise_name, write_spectrum
    from pipeline.extraction.trace import traces_to_table

    fo = _options(flexure, FLEXURE_DEFAULTS, "flexure")
    if sky_lines:
        fo["line_list"] = sky_lines
    cal = read_frame(frame)
    wave_map = _read_map(wavelength)
    if wave_map.shape != cal.shape:
        raise InputFileError(wavelength, f"wavelength map shape {wave_map.shape} differs from "
                             f"the calibrated frame {frame} {cal.shape}; expected the solution "
                             "of an arc of the same setup and binning")
    binspat = cal.header.get("BINSPAT")
    if binspat is None:
        warnings.warn(f"{frame}: keyword BINSPAT missing; expected the binning along the slit; "
                      "assuming 1", InputFileWarning)
        binspat = 1
    scale = float(spatial_scale_arcsec_per_px) * float(binspat)
    lines = skylines.load_sky_lines(fo["line_list"], verified_only=not fo["use_unverified_lines"])
    reference_path = _as_path_or_none(reference)
    ref_trace, ref_name = (_reference_from_table(reference_path) if reference_path
                           else (None, ""))

    red = reduce_frame(cal.data, cal.variance, cal.mask, wave_map,
                       line_wave_angstrom=np.asarray(lines["wavelength_air_angstrom"], float),
                       line_species=[str(x) for x in lines["species"]],
                       spatial_scale_arcsec_per_px=scale, reference_trace=ref_trace,
                       reference_name=ref_name, rectification=rectification, flexure=fo,
                       sky=sky, tracing=tracing, extraction=extraction)
    grid = red.rectified.grid
    ny = red.rectified.data.shape[0]
    base = _product_header(cal.header)
    obj_name = str(cal.header.get("OBJECT", frame_id))
    base["SETUP"] = (str(setup), "instrument setup id (night inventory)")
    base["FRAMEID"] = (str(frame_id), "frame id of the exposure")
    base["FRAMETYP"] = (str(frame_type), "standard or science")
    flex = red.flexure
    base["FLEXPIX"] = (round(float(flex.shift_px), 5), "flexure shift applied, px (+ = to larger x)")
    base["FLEXERR"] = (round(float(flex.shift_err_px), 5) if np.isfinite(flex.shift_err_px)
                       else -1.0, "its 1-sigma error, px (-1 = not measured)")
    base["FLEXKMS"] = (round(float(flex.shift_kms), 4), "flexure shift as a velocity, km/s")
    base["FLEXSTAT"] = (flex.status, "flexure measurement status")
    base["SKYSUB"] = (True, "night sky subtracted (Kelson 2003 b-spline)")
    base["VARCORR"] = (round(float(red.rectified.info["variance_correlation"]), 4),
                       "var of long sums along x / sum of pixel vars")
    a_var, b_var, c_var = red.sky_info["variance_coefficients"]
    base["VARRN"] = (round(float(a_var), 4), "variance model: constant term, e2")
    base["VARGAIN"] = (round(float(b_var), 5), "variance model: e2 per e of signal")
    base["VARFLAT"] = (float(f"{c_var:.5g}"), "variance model: flat term, per e2 of signal")
    inputs = [frame, wavelength] + ([reference_path] if reference_path else [])

    # -- rectified frame
    rhdr = base.copy()
    for card in grid.wcs_cards(axis=1) + slit_wcs_cards(ny, scale, axis=2):
        rhdr[card[0]] = card[1:]
    rhdr["WCSAXES"] = 2
    rhdr.setdefault("SPECSYS", "TOPOCENT")
    provenance.stamp(rhdr, inputs=inputs, calibrations=[wavelength])

    def image(arr, name, comment, dtype=np.float32):
        h = fits.Header()
        for card in grid.wcs_cards(axis=1) + slit_wcs_cards(ny, scale, axis=2):
            h[card[0]] = card[1:]
        h["COMMENT"] = comment
        return fits.ImageHDU(np.asarray(arr, dtype=dtype), header=h, name=name)

    extra = [image(red.sky, "SKY", "sky model subtracted from PRIMARY, electron"),
             image(red.sky_variance, "SKYVAR", "variance of the sky model (correlated along "
                   "the slit), electron2"),
             image(red.background_variance, "BKGVAR", "noise-free variance of read noise and "
                   "sky, electron2"),
             image(red.signal_variance_factor, "SIGVARF", "variance per electron of object "
                   "signal"),
             image(red.signal_variance_quadratic, "SIGVARQ", "flat-field variance term q: "
                   "q*(m**2+2*SKY*m) for signal m"),
             image(red.sky_region, "SKYREG", "1 = pixel used as sky", dtype=np.uint8)]
    write_frame(Frame(red.rectified.data, red.rectified.variance, red.rectified.mask, rhdr,
                      cal.unit), rectified, extra_hdus=extra)

    # -- flexure and trace tables
    ftab = Table(flex.lines, copy=True) if len(flex.lines.colnames) else Table()
    ftab.meta.update({"frame_id": str(frame_id), "shift_px": float(flex.shift_px),
                      "shift_err_px": float(flex.shift_err_px), "shift_kms": float(flex.shift_kms),
                      "status": flex.status, "n_used": int(flex.info.get("n_used", 0)),
                      "description": "night-sky lines fitted for the flexure shift "
                                     "(pipeline.extraction.flexure)"})
    Path(flexure_table).parent.mkdir(parents=True, exist_ok=True)
    ftab.write(flexure_table, format="ascii.ecsv", overwrite=True)
    ttab = traces_to_table(red.traces, frame_id=str(frame_id), object_name=obj_name)
    ttab.write(traces, format="ascii.ecsv", overwrite=True)

    # -- 1-D products
    out_dir = Path(spectra)
    out_dir.mkdir(parents=True, exist_ok=True)
    rows = []
    stem = sanitise_name(obj_name)
    wave = grid.centres_angstrom()
    for ap, (tr, h, ex) in enumerate(zip(red.traces, red.half_widths_px, red.extractions),
                                     start=1):
        name = f"{stem}_ap{ap}.fits"
        hdr = base.copy()
        hdr["APERTURE"] = (ap, "aperture number (1 = highest S/N)")
        hdr["NOBJECTS"] = (len(red.traces), "objects traced on this frame")
        hdr["APCENPX"] = (round(tr.centre_px, 4), "trace centre at APREFWL, rectified row")
        hdr["APCENAS"] = (round((tr.centre_px - 0.5 * (ny - 1)) * scale, 4),
                          "same, arcsec from the slit centre")
        hdr["APREFWL"] = (round(tr.reference_wave_angstrom, 3), "reference wavelength, Angstrom")
        hdr["APHWPX"] = (round(float(h), 4), "boxcar half width, rows")
        hdr["APFWHMPX"] = (round(float(tr.fwhm_px), 4), "spatial FWHM, rows")
        hdr["TRCMODE"] = (tr.mode, "own, reference (offset fitted) or fixed")
        hdr["TRCREF"] = (str(tr.reference)[:60], "reference of the trace shape")
        hdr["EXTMETH"] = ("optimal", "HDU 0; boxcar in BOXFLUX")
        hdr["SNRMED"] = (round(float(ex.info["snr_median"]), 3), "median S/N per pixel, optimal")
        hdr["NREJECT"] = (int(ex.info["n_rejected"]), "pixels rejected in the profile fit")
        provenance.stamp(hdr, inputs=inputs, calibrations=[wavelength])
        write_spectrum(out_dir / name, grid, hdr, flux=ex.flux, variance=ex.variance,
                       mask=ex.mask, boxcar_flux=ex.boxcar_flux,
                       boxcar_variance=ex.boxcar_variance, boxcar_mask=ex.boxcar_mask,
                       sky=ex.sky, trace_px=ex.trace_px)
        good = ex.mask == 0
        rows.append([str(frame_id), obj_name, ap, name, tr.centre_px,
                     (tr.centre_px - 0.5 * (ny - 1)) * scale, tr.fwhm_px, tr.mode,
                     float(ex.info["snr_median"]), float(np.sum(ex.flux[good])), "ok"])
    listing = Table(rows=rows or None, names=LISTING_COLUMNS,
                    dtype=[str, str, int, str, float, float, float, str, float, float, str])
    listing.meta.update({"frame_id": str(frame_id), "setup": str(setup),
                         "wavelength_start_angstrom": float(wave[0]),
                         "description": "1-D spectra written for this frame (pipeline.core.spectra)"})
    listing.write(out_dir / "extraction.ecsv", format="ascii.ecsv", overwrite=True)
    if not red.traces:
        from pipeline.extraction.trace import TracingWarning
        warnings.warn(f"{frame}: no object above the detection threshold; no spectrum written",
                      TracingWarning)

    title = f"{frame_id}  {obj_name}  ({frame_type}, {setup})"
    plot_rectified_frame(red, qa_rectified, title=title, arcsec_per_px=scale)
    plot_spectra(red, qa_spectra, title=title)
    return red
