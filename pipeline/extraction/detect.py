"""Find objects on the slit: the collapsed spatial profile, peaks, the object mask.

The frame is collapsed along the dispersion (median of the good pixels of
each row, so sky-line residuals and cosmic rays do not matter), smoothed with
a Gaussian of the expected seeing (a matched filter) and searched for peaks
(:func:`scipy.signal.find_peaks`) whose height *and* prominence (height above
the saddle towards any brighter neighbour) exceed ``snr_min`` times the noise,
so a shoulder on the wing of an extended object is not a second object. The
noise of the smoothed profile is measured from the profile itself (1.4826 x
median absolute deviation, with the objects excluded), so the detection S/N is
honest whatever the correlations of the pixels. Every peak above ``snr_min`` is
a candidate; its centre and FWHM come from a Gaussian fit to the unsmoothed
profile, its extent from where the smoothed profile stays above ``extent_snr``.

Before the sky is modelled, :func:`object_mask` finds the objects on the
*native* frame (after subtracting a crude sky: the running median of all
pixels sorted by wavelength) and masks them, following their drift along the
dispersion.
"""

import warnings
from dataclasses import dataclass

import numpy as np
from scipy.ndimage import gaussian_filter1d
from scipy.optimize import curve_fit
from scipy.signal import find_peaks

from pipeline.core.errors import ExtractionError
from pipeline.core.maskbits import MaskBit

__all__ = ["Detection", "CandidateReview", "spatial_profile", "find_objects",
           "review_candidates", "crude_sky", "object_mask", "FWHM_PER_SIGMA"]

#: FWHM of a Gaussian in units of its sigma
FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))
_FWHM_PER_SIGMA = FWHM_PER_SIGMA

@dataclass(frozen=True)
class Detection:
    """An object found on the slit.

    Attributes
    ----------
    position_px : float
        Centre, rows (0-based).
    snr : float
        Detection S/N of the matched-filtered collapsed profile.
    fwhm_px : float
        FWHM of a Gaussian fitted to the collapsed profile, rows.
    amplitude : float
        Peak of that Gaussian (median electrons per pixel).
    extent_px : tuple of float
        Rows (lo, hi) where the smoothed profile exceeds the extent threshold.
    """

    position_px: float
    snr: float
    fwhm_px: float
    amplitude: float
    extent_px: tuple


# -- collapsed profiles and detection ----------------------------------------------------
def good_pixels(data, variance, mask):
    return (np.asarray(mask) == 0) & np.isfinite(data) & np.isfinite(variance)


def _usable_columns(good):
    """Columns with at least half as many good rows as the best column, shape (nx,)."""
    n_col = good.sum(axis=0)
    return (n_col > 0) & (n_col >= 0.5 * n_col.max())


def spatial_profile(data, variance, mask, *, max_masked_fraction=0.5):
    """Median of the good pixels of every row.

    Parameters
    ----------
    data, variance : ndarray, shape (ny, nx)
    mask : ndarray of uint8, shape (ny, nx)
    max_masked_fraction : float
        Rows with more masked pixels are interpolated from their neighbours
        (bad columns of the detector), so they neither hide nor fake objects.
        The fraction is counted over the *usable* columns only (columns with
        at least half as many good rows as the best column), so a block of
        columns masked in every row (e.g. the unilluminated blue end of a
        large detector) does not count against every row.

    Returns
    -------
    ndarray, shape (ny,)

    Raises
    ------
    ExtractionError
        When no row has enough good pixels (no usable column at all).
    """
    data = np.asarray(data, float)
    good = good_pixels(data, variance, mask)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        prof = np.nanmedian(np.where(good, data, np.nan), axis=1)
    usable_cols = _usable_columns(good)
    n_usable = int(usable_cols.sum())
    if n_usable == 0:
        raise ExtractionError(f"every pixel of the {good.shape[0]} x {good.shape[1]} frame "
                              "(rows x columns) is masked; nothing to trace")
    frac_bad = 1.0 - (good & usable_cols[None, :]).sum(axis=1) / n_usable
    bad = ~np.isfinite(prof) | (frac_bad > max_masked_fraction)
    if bad.all():
        raise ExtractionError(f"every row of the {good.shape[0]} x {good.shape[1]} frame has "
                              f"more than {100.0 * max_masked_fraction:.0f} % of its usable "
                              "columns masked; nothing to trace")
    rows = np.arange(prof.size)
    prof[bad] = np.interp(rows[bad], rows[~bad], prof[~bad])
    return prof


def robust_sigma(values):
    med = np.median(values)
    return 1.4826 * np.median(np.abs(values - med))


def _gauss(y, amp, centre, sigma, base):
    return base + amp * np.exp(-0.5 * ((y - centre) / sigma) ** 2)


def fit_gaussian(rows, values, errors, centre0, sigma0):
    """Gaussian + constant fit; returns (amp, centre, sigma, base), errors or None."""
    amp0 = float(np.max(values) - np.median(values))
    p0 = [max(amp0, 1e-12), centre0, sigma0, float(np.median(values))]
    lower = [0.0, rows.min(), 0.3, -np.inf]
    upper = [np.inf, rows.max(), max(rows.max() - rows.min(), 1.0), np.inf]
    try:
        popt, pcov = curve_fit(_gauss, rows, values, p0=p0, sigma=errors, absolute_sigma=True,
                               bounds=(lower, upper), maxfev=2000)
    except (RuntimeError, ValueError):
        return None, None
    perr = np.sqrt(np.clip(np.diag(pcov), 0, None))
    if not np.all(np.isfinite(perr)):
        return None, None
    return popt, perr



def _run_around(above, index):
    """First and last index of the run of True values of ``above`` that contains ``index``."""
    lo = hi = int(index)
    while lo > 0 and above[lo - 1]:
        lo -= 1
    while hi < above.size - 1 and above[hi + 1]:
        hi += 1
    return lo, hi

def find_objects(profile, *, fwhm_guess_px=3.0, snr_min=5.0, max_objects=10,
                 min_separation_fwhm=1.5, extent_snr=1.5, edge_px=2):
    """Find objects in a collapsed spatial profile.

    Parameters
    ----------
    profile : ndarray, shape (ny,)
        Sky-subtracted collapsed profile (e.g. :func:`spatial_profile`).
    fwhm_guess_px : float
        Expected seeing FWHM, rows (width of the matched filter).
    snr_min : float
        Detection threshold on the smoothed profile (height above the
        background and prominence), in units of its noise.
    max_objects : int
        Keep at most this many (highest S/N first).
    min_separation_fwhm : float
        Peaks closer than this many FWHM are one object.
    extent_snr : float
        The extent of an object is where the smoothed profile exceeds this many sigma.
    edge_px : int
        Peaks this close to the ends of the slit are ignored.

    Returns
    -------
    list of Detection
        Sorted by decreasing S/N.

    Examples
    --------
    >>> y = np.arange(100.0)
    >>> prof = 50 * np.exp(-0.5 * ((y - 40) / 1.3) ** 2) + np.random.default_rng(1).normal(0, 1, 100)
    >>> [round(d.position_px) for d in find_objects(prof)]
    [40]
    """
    prof = np.asarray(profile, float)
    if prof.ndim != 1 or prof.size < 8:
        raise ValueError(f"`profile` must be 1-D with at least 8 rows, got shape {prof.shape}")
    sigma_f = max(fwhm_guess_px / _FWHM_PER_SIGMA, 0.5)
    smooth = gaussian_filter1d(prof, sigma_f, mode="nearest")
    rows = np.arange(prof.size, dtype=float)
    excluded = np.zeros(prof.size, bool)
    noise = level = 0.0
    peaks = np.array([], int)
    for _ in range(3):  # noise from the object-free part, then detect again
        level = float(np.median(smooth[~excluded]))
        noise = robust_sigma(smooth[~excluded])
        if not noise > 0:
            noise = float(np.std(smooth[~excluded])) or 1.0
        peaks, _ = find_peaks(smooth - level, height=snr_min * noise,
                              prominence=snr_min * noise,
                              distance=max(1, int(min_separation_fwhm * fwhm_guess_px)))
        new = np.zeros(prof.size, bool)
        above = (smooth - level) > extent_snr * noise
        for p in peaks:
            lo, hi = _run_around(above, p)
            pad = int(np.ceil(2 * fwhm_guess_px))
            new[max(lo - pad, 0):hi + pad + 1] = True
        if np.array_equal(new, excluded) or new.mean() > 0.8:
            break
        excluded = new
    noise_raw = robust_sigma(prof[~excluded] if (~excluded).sum() > 5 else prof)
    out = []
    for p in peaks:
        if p < edge_px or p > prof.size - 1 - edge_px:
            continue
        snr = float((smooth[p] - level) / noise)
        half = int(np.ceil(2.5 * fwhm_guess_px)) + 2
        sel = slice(max(p - half, 0), min(p + half + 1, prof.size))
        popt, _ = fit_gaussian(rows[sel], prof[sel], np.full(rows[sel].size, noise_raw or 1.0),
                                float(p), sigma_f)
        if popt is None or abs(popt[1] - p) > 2 * fwhm_guess_px:
            centre, fwhm, amp = float(p), fwhm_guess_px, float(prof[p] - level)
        else:
            centre, fwhm, amp = float(popt[1]), float(popt[2] * _FWHM_PER_SIGMA), float(popt[0])
        lo, hi = _run_around(above, p)
        out.append(Detection(centre, snr, fwhm, amp, (float(lo), float(hi))))
    # merge peaks that fitted onto the same object
    out.sort(key=lambda d: -d.snr)
    kept = []
    for d in out:
        if all(abs(d.position_px - k.position_px) > min_separation_fwhm * max(k.fwhm_px, 1.0)
               for k in kept):
            kept.append(d)
    return kept[:max_objects]


@dataclass(frozen=True)
class CandidateReview:
    """Which detected candidates are sources (:func:`review_candidates`).

    Attributes
    ----------
    objects : list of Detection
        Candidates kept, in the order given.
    rejected : list of (Detection, str)
        Candidates that are not sources, with the reason.
    residual_level : float
        Depth of the deepest negative structure of the smoothed profile below its
        median (same units as the profile): the level of the sky-fit residuals.
    noise : float
        Robust noise of the smoothed profile.
    seeing_px : float
        FWHM (rows) a point source has on this frame.
    """

    objects: list
    rejected: list
    residual_level: float
    noise: float
    seeing_px: float


def review_candidates(profile, candidates, *, fwhm_guess_px=3.0, residual_factor=1.5,
                      min_fwhm_seeing=0.5, edge_px=2):
    """Keep the candidates that are sources, reject the structures of the sky fit.

    Parameters
    ----------
    profile : ndarray, shape (ny,)
        Sky-subtracted collapsed profile the candidates were found in.
    candidates : list of Detection
        From :func:`find_objects`, highest S/N first.
    fwhm_guess_px : float
        Expected seeing FWHM, rows (the matched filter of the detection).
    residual_factor : float
        A source must peak above this many times the depth of the deepest negative
        structure of the smoothed profile (0 = no such test).
    min_fwhm_seeing : float
        A source is at least this fraction of the seeing wide (0 = no such test).
    edge_px : int
        Rows at each slit end left out of the residual level.

    Returns
    -------
    CandidateReview

    Notes
    -----
    No source is negative: negative structure of the smoothed, sky-subtracted
    profile outside the objects is sky-fit residual (slit-illumination errors,
    slit defects the illumination spline cannot follow) or noise, and positive
    residual structure of the same kind reaches about the same height. A candidate
    that does not rise above ``residual_factor`` times the deepest negative
    structure cannot be told from the residuals, whatever its S/N against the
    pixel noise. Light from the sky is blurred by the seeing before it enters the
    slit, so no source is narrower than the seeing; narrower structures are
    defects of the slit or the detector. The seeing is the FWHM of the brightest
    candidate that passes the first test, at most ``fwhm_guess_px`` (an extended
    brightest object does not widen it).

    Examples
    --------
    >>> y = np.arange(120.0)
    >>> prof = 80 * np.exp(-0.5 * ((y - 40) / 1.3) ** 2) + np.random.default_rng(2).normal(0, 1, 120)
    >>> prof[90:92] += 12.0   # a defect two rows wide
    >>> found = find_objects(prof, fwhm_guess_px=3.0)
    >>> [round(d.position_px) for d in found]
    [40, 90]
    >>> review = review_candidates(prof, found, fwhm_guess_px=3.0)
    >>> [round(d.position_px) for d in review.objects], review.rejected[0][1][:20]
    ([40], 'narrower than the se')
    """
    prof = np.asarray(profile, float)
    sigma_f = max(fwhm_guess_px / _FWHM_PER_SIGMA, 0.5)
    smooth = gaussian_filter1d(prof, sigma_f, mode="nearest")
    rows = np.arange(prof.size)
    objects_rows = np.zeros(prof.size, bool)
    pad = int(np.ceil(fwhm_guess_px))
    for d in candidates:
        lo, hi = int(np.floor(d.extent_px[0])), int(np.ceil(d.extent_px[1]))
        objects_rows[max(lo - pad, 0):hi + pad + 1] = True
    free = ~objects_rows
    edge = int(edge_px) + pad
    free[:edge] = False
    free[max(prof.size - edge, 0):] = False
    if free.sum() < 5:
        free = ~objects_rows if (~objects_rows).sum() >= 5 else np.ones(prof.size, bool)
    level = float(np.median(smooth[free]))
    noise = robust_sigma(smooth[free]) or float(np.std(smooth[free])) or 1.0
    residual = max(level - float(np.min(smooth[free])), 0.0)
    kept, rejected = [], []
    for d in candidates:
        height = float(smooth[int(np.clip(round(d.position_px), 0, prof.size - 1))] - level)
        if residual_factor > 0 and height <= residual_factor * residual:
            rejected.append((d, f"not above the sky-fit residuals: peak {height:.3g} <= "
                                f"{residual_factor:g} x the deepest negative structure "
                                f"{residual:.3g} (rows {int(rows[free][0])}-"
                                f"{int(rows[free][-1])})"))
        else:
            kept.append(d)
    seeing = float(fwhm_guess_px)
    if kept:
        seeing = min(seeing, float(kept[0].fwhm_px))
    real = []
    for d in kept:
        if min_fwhm_seeing > 0 and d.fwhm_px < min_fwhm_seeing * seeing:
            rejected.append((d, f"narrower than the seeing: FWHM {d.fwhm_px:.2f} rows < "
                                f"{min_fwhm_seeing:g} x {seeing:.2f}"))
        else:
            real.append(d)
    return CandidateReview(real, rejected, residual, noise, seeing)


# -- object mask on the native frame --------------------------------------------------
def crude_sky(data, mask, wave_map, *, bin_px=0.5):
    """Crude sky: median of all good pixels in narrow wavelength bins.

    Parameters
    ----------
    data : ndarray, shape (ny, nx), electron
    mask : ndarray of uint8, shape (ny, nx)
    wave_map : ndarray, shape (ny, nx), Angstrom
    bin_px : float
        Bin width in units of the median dispersion.

    Returns
    -------
    ndarray, shape (ny, nx)
        The median of each bin interpolated to every pixel's wavelength.
    """
    data = np.asarray(data, float)
    wave_map = np.asarray(wave_map, float)
    good = (np.asarray(mask) == 0) & np.isfinite(data) & np.isfinite(wave_map)
    lam, val = wave_map[good], data[good]
    disp = float(np.median(np.abs(np.diff(wave_map[wave_map.shape[0] // 2]))))
    width = bin_px * disp
    idx = np.floor((lam - lam.min()) / width).astype(np.int64)
    order = np.lexsort((val, idx))
    idx_s, val_s, lam_s = idx[order], val[order], lam[order]
    starts = np.flatnonzero(np.r_[True, np.diff(idx_s) != 0])
    ends = np.r_[starts[1:], idx_s.size]
    med = 0.5 * (val_s[(starts + ends - 1) // 2] + val_s[(starts + ends) // 2])
    centres = np.add.reduceat(lam_s, starts) / (ends - starts)
    return np.interp(wave_map, centres, med)


def object_mask(data, variance, mask, wave_map, *, fwhm_guess_px=3.0, snr_min=5.0,
                pad_fwhm=1.5, n_blocks=8, max_objects=10):
    """Pixels free of object light on a native (unrectified) frame.

    Parameters
    ----------
    data, variance : ndarray, shape (ny, nx)
    mask : ndarray of uint8, shape (ny, nx)
    wave_map : ndarray, shape (ny, nx), Angstrom
    fwhm_guess_px : float
        Expected seeing FWHM, rows.
    snr_min : float
        Detection threshold (see :func:`find_objects`).
    pad_fwhm : float
        Margin added on both sides of an object's extent, in FWHM.
    n_blocks : int
        Blocks along the dispersion in which the object's drift is followed.

    Returns
    -------
    sky_pixels : ndarray of bool, shape (ny, nx)
        True where no object light is expected.
    detections : list of Detection
    """
    data = np.asarray(data, float)
    ny, nx = data.shape
    resid = data - crude_sky(data, mask, wave_map)
    prof = spatial_profile(resid, variance, mask)
    dets = find_objects(prof, fwhm_guess_px=fwhm_guess_px, snr_min=snr_min,
                        max_objects=max_objects)
    sky = np.ones(data.shape, bool)
    if not dets:
        return sky, dets
    # the drift blocks span the usable columns only (the blue end of a large
    # detector can be unilluminated over many columns: a block there would have
    # no good pixel); a block that still has too few good pixels is skipped
    usable = np.flatnonzero(_usable_columns(good_pixels(resid, variance, mask)))
    c0, c1 = (int(usable[0]), int(usable[-1]) + 1) if usable.size else (0, nx)
    bounds = np.linspace(c0, c1, max(n_blocks, 1) + 1).astype(int)
    block_prof = []
    for b0, b1 in zip(bounds[:-1], bounds[1:]):
        try:
            block_prof.append(spatial_profile(resid[:, b0:b1], variance[:, b0:b1],
                                              mask[:, b0:b1]))
        except ExtractionError:
            block_prof.append(None)
    xb = 0.5 * (bounds[:-1] + bounds[1:] - 1)
    rows = np.arange(ny)
    x = np.arange(nx)
    for d in dets:
        centres = []
        for bp in block_prof:
            if bp is None:
                centres.append(np.nan)
                continue
            sel = np.abs(rows - d.position_px) <= max(d.fwhm_px, 2.0)
            sm = gaussian_filter1d(bp, max(d.fwhm_px / _FWHM_PER_SIGMA, 0.5))
            r = rows[sel]
            wts = np.clip(sm[sel] - np.median(sm), 0, None)
            centres.append(float(np.sum(r * wts) / wts.sum()) if wts.sum() > 0 else np.nan)
        centres = np.asarray(centres)
        ok = np.isfinite(centres) & (np.abs(centres - d.position_px) < 2 * d.fwhm_px)
        if ok.sum() >= 3:
            coef = np.polyfit(xb[ok], centres[ok], 1)
            drift = np.polyval(coef, x) - np.polyval(coef, np.median(xb[ok]))
            drift -= np.median(drift) - 0.0
        else:
            drift = np.zeros(nx)
        pad = pad_fwhm * d.fwhm_px
        lo = d.extent_px[0] - pad - d.position_px
        hi = d.extent_px[1] + pad - d.position_px
        lo = min(lo, -pad - 0.5 * d.fwhm_px)
        hi = max(hi, pad + 0.5 * d.fwhm_px)
        yc = d.position_px + drift[None, :]
        sky &= ~((rows[:, None] >= yc + lo) & (rows[:, None] <= yc + hi))
    return sky, dets
