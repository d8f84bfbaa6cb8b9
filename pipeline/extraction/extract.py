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

A relative error common to all rows of a column's aperture (``systematic_fraction``,
config ``extraction.systematic_fraction``) is added as ``(fraction * flux)**2`` to both
variances: per-pixel noise models treat the flat field's pixels as independent, so
structure of the flat along the slit (slit-width ripples the slit-illumination fit
leaves in the pixel response, e.g.) does not average down over the aperture's rows
and shows at high S/N. It is common to neighbouring columns as well (an error of the
flux scale of the spectrum), so it does not average down along the dispersion either.

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

from pipeline.core.checks import as_1d_float, as_2d, positive, same_shape
from pipeline.core.errors import ExtractionError
from pipeline.core.maskbits import MASK_DTYPE, MaskBit

__all__ = ["Extraction", "extract", "aperture_weights", "theoretical_variance"]


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
            profile_error_fraction=0.02, max_masked_profile=0.5, max_saturated_profile=0.05,
            systematic_fraction=0.0):
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
    systematic_fraction : float
        Relative error common to all pixels of a column's aperture (flat-field
        structure along the slit, profile-model error): ``(systematic_fraction *
        flux)**2`` is added to both variances (module notes).

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
    data = as_2d(data, "data", dtype=float)
    variance = as_2d(variance, "variance", dtype=float)
    mask = as_2d(mask, "mask", dtype=MASK_DTYPE)
    same_shape([data, variance, mask], ["data", "variance", "mask"])
    ny, n = data.shape
    trace = as_1d_float(trace_px, "trace_px", size=n)
    half_width_px = positive(half_width_px, "half_width_px")
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
    opt_var = var_pix + var_sky + (systematic_fraction * flux) ** 2

    # boxcar with masked pixels replaced by the profile model
    model = flux[None, :] * prof
    filled = np.where(good, data, model)
    box_flux = np.sum(boxw * filled, axis=0)
    box_pix_var = var_r if use_model else np.where(np.isfinite(pix_var), pix_var, 0.0)
    box_pix_var = np.where(np.isfinite(box_pix_var), box_pix_var, 0.0)
    box_var = (np.sum(boxw ** 2 * box_pix_var, axis=0) + np.sum(boxw * sky_err, axis=0) ** 2
               + (systematic_fraction * box_flux) ** 2)
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
