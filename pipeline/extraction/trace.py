"""Find objects on the slit and trace them along the dispersion.

Detection
---------
The frame is collapsed along the dispersion (median of the good pixels of
each row, so sky-line residuals and cosmic rays do not matter), smoothed with
a Gaussian of the expected seeing (a matched filter) and searched for peaks
(:func:`scipy.signal.find_peaks`) whose height *and* prominence (height above
the saddle towards any brighter neighbour) exceed ``snr_min`` times the noise,
so a shoulder on the wing of an extended object is not a second object. The
noise of the smoothed profile is
measured from the profile itself (1.4826 x median absolute deviation, with
the objects excluded), so the detection S/N is honest whatever the
correlations of the pixels. Every peak above ``snr_min`` is an object; its
centre and FWHM come from a Gaussian fit to the unsmoothed profile, its
extent from where the smoothed profile stays above ``extent_snr``.

Tracing
-------
Bright objects: the frame is cut into ``n_bins`` wavelength bins; in each a
median spatial profile is fitted by a Gaussian; the centres are fitted
against wavelength by a Chebyshev polynomial with iterative sigma clipping
(:class:`astropy.modeling.fitting.FittingWithOutlierRemoval`).
Faint objects (detection S/N below ``own_trace_snr``, or too few usable bins)
borrow the shape of a bright reference trace (the standard star of the same
setup): the frame is shifted column by column by the reference shape, the
straightened frame is collapsed, and only an offset is fitted. Without a
reference, a faint object gets a constant position (``mode='fixed'``).

Before the sky is modelled, :func:`object_mask` finds the objects on the
*native* frame (after subtracting a crude sky: the running median of all
pixels sorted by wavelength) and masks them, following their drift along the
dispersion.
"""

import warnings
from dataclasses import dataclass, field

import numpy as np
from numpy.polynomial import chebyshev
from scipy.ndimage import gaussian_filter1d, map_coordinates
from scipy.optimize import curve_fit
from scipy.signal import find_peaks

from pipeline.core.errors import ExtractionError, PipelineWarning
from pipeline.core.maskbits import MaskBit

__all__ = ["Detection", "Trace", "spatial_profile", "find_objects", "crude_sky",
           "object_mask", "trace_object", "offset_trace", "fixed_trace", "trace_frame",
           "traces_to_table", "traces_from_table", "TracingWarning"]

_FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))


class TracingWarning(PipelineWarning):
    """An object could not be traced on its own, or apertures had to be narrowed."""


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


@dataclass(frozen=True)
class Trace:
    """The centre of an object along the dispersion.

    Attributes
    ----------
    coefficients : ndarray, shape (order + 1,)
        Chebyshev coefficients of the centre (rows) in the wavelength mapped
        from ``domain_angstrom`` to [-1, 1].
    domain_angstrom : tuple of float
    fwhm_px : float
        Spatial FWHM of the object, rows.
    snr : float
        Detection S/N.
    mode : str
        ``own``, ``reference`` or ``fixed``.
    reference : str
        Name of the reference trace for mode ``reference`` (else '').
    info : dict
        ``rms_px`` (residual rms of the bin centres), ``n_bins_used``,
        ``bin_wave_angstrom``, ``bin_centre_px``, ``bin_err_px``, ``bin_used``.
    """

    coefficients: np.ndarray
    domain_angstrom: tuple
    fwhm_px: float
    snr: float
    mode: str = "own"
    reference: str = ""
    info: dict = field(default_factory=dict)

    def position_px(self, wave_angstrom):
        """Trace centre (rows) at the given wavelengths (Angstrom)."""
        lo, hi = self.domain_angstrom
        u = (2.0 * np.asarray(wave_angstrom, float) - (lo + hi)) / (hi - lo)
        return chebyshev.chebval(u, self.coefficients)

    @property
    def reference_wave_angstrom(self):
        """Middle of the domain: where ``centre_px`` is quoted."""
        return 0.5 * (self.domain_angstrom[0] + self.domain_angstrom[1])

    @property
    def centre_px(self):
        return float(self.position_px(self.reference_wave_angstrom))

    def shifted(self, offset_px, *, mode, reference="", fwhm_px=None, snr=None, info=None):
        """Same shape, moved by ``offset_px`` rows."""
        coef = np.array(self.coefficients, float)
        coef[0] += offset_px
        return Trace(coef, self.domain_angstrom, self.fwhm_px if fwhm_px is None else fwhm_px,
                     self.snr if snr is None else snr, mode, reference, info or {})


# -- collapsed profiles and detection ----------------------------------------------------
def _good(data, variance, mask):
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
    good = _good(data, variance, mask)
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


def _robust_sigma(values):
    med = np.median(values)
    return 1.4826 * np.median(np.abs(values - med))


def _gauss(y, amp, centre, sigma, base):
    return base + amp * np.exp(-0.5 * ((y - centre) / sigma) ** 2)


def _fit_gaussian(rows, values, errors, centre0, sigma0):
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
        noise = _robust_sigma(smooth[~excluded])
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
    noise_raw = _robust_sigma(prof[~excluded] if (~excluded).sum() > 5 else prof)
    out = []
    for p in peaks:
        if p < edge_px or p > prof.size - 1 - edge_px:
            continue
        snr = float((smooth[p] - level) / noise)
        half = int(np.ceil(2.5 * fwhm_guess_px)) + 2
        sel = slice(max(p - half, 0), min(p + half + 1, prof.size))
        popt, _ = _fit_gaussian(rows[sel], prof[sel], np.full(rows[sel].size, noise_raw or 1.0),
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
    usable = np.flatnonzero(_usable_columns(_good(resid, variance, mask)))
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


# -- tracing on the rectified frame ---------------------------------------------------
def _fit_centres(wave, centres, errors, order, reject_sigma):
    from astropy.modeling import fitting, models
    from astropy.stats import sigma_clip

    lo, hi = float(wave.min()), float(wave.max())
    model = models.Chebyshev1D(order, domain=(lo, hi))
    fitter = fitting.FittingWithOutlierRemoval(fitting.LinearLSQFitter(), sigma_clip,
                                               niter=3, sigma=reject_sigma)
    fitted, rejected = fitter(model, wave, centres, weights=1.0 / errors)
    coef = np.array([getattr(fitted, f"c{i}").value for i in range(order + 1)])
    return coef, np.asarray(rejected, bool)


def trace_object(data, variance, mask, wave_angstrom, y_guess_px, *, fwhm_guess_px=3.0,
                 n_bins=24, order=3, reject_sigma=3.0, min_bin_snr=5.0, window_fwhm=3.0):
    """Trace one object on a rectified, sky-subtracted frame.

    Parameters
    ----------
    data, variance : ndarray, shape (ny, n), electron, electron^2
    mask : ndarray of uint8, shape (ny, n)
    wave_angstrom : ndarray, shape (n,)
        Wavelength of every column.
    y_guess_px : float
        Starting position, rows.
    fwhm_guess_px : float
        Starting FWHM.
    n_bins : int
        Wavelength bins in which the centre is measured.
    order : int
        Order of the Chebyshev polynomial of the centre against wavelength.
    reject_sigma : float
        Sigma clipping of the bin centres around the fit.
    min_bin_snr : float
        Smallest S/N of a bin's Gaussian amplitude to use its centre.
    window_fwhm : float
        Half width of the fitting window, in FWHM.

    Returns
    -------
    Trace or None
        None when fewer than ``order + 3`` bins gave a centre.
    """
    data = np.asarray(data, float)
    variance = np.asarray(variance, float)
    ny, n = data.shape
    wave = np.asarray(wave_angstrom, float)
    good = _good(data, variance, mask)
    bounds = np.linspace(0, n, n_bins + 1).astype(int)
    rows = np.arange(ny, dtype=float)
    sigma0 = fwhm_guess_px / _FWHM_PER_SIGMA
    half = max(int(np.ceil(window_fwhm * fwhm_guess_px)), 3)
    bw, bc, be, bs = [], [], [], []
    bsat = []  # bins whose window holds SATURATED pixels: their cores are flattened
    saturated = (np.asarray(mask).astype(np.int64) & int(MaskBit.SATURATED)) != 0
    guess = float(y_guess_px)
    for b0, b1 in zip(bounds[:-1], bounds[1:]):
        if b1 - b0 < 3:
            continue
        lo, hi = max(int(round(guess)) - half, 0), min(int(round(guess)) + half + 1, ny)
        sub = np.where(good[lo:hi, b0:b1], data[lo:hi, b0:b1], np.nan)
        nn = np.sum(good[lo:hi, b0:b1], axis=1)
        if np.any(nn < 0.5 * (b1 - b0)):
            continue
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            prof = np.nanmedian(sub, axis=1)
            err = 1.2533 * np.sqrt(np.nanmean(np.where(good[lo:hi, b0:b1],
                                                       variance[lo:hi, b0:b1], np.nan), axis=1)
                                   / nn)
        popt, perr = _fit_gaussian(rows[lo:hi], prof, err, guess, sigma0)
        if popt is None:
            continue
        snr = popt[0] / perr[0] if perr[0] > 0 else 0.0
        if snr < min_bin_snr or abs(popt[1] - guess) > fwhm_guess_px or perr[1] > fwhm_guess_px:
            continue
        bw.append(np.mean(wave[b0:b1]))
        bc.append(popt[1])
        be.append(max(perr[1], 1e-3))
        bs.append(popt[2] * _FWHM_PER_SIGMA)
        bsat.append(bool(saturated[lo:hi, b0:b1].any()))
    if len(bc) < order + 3:
        return None
    bw, bc, be = np.array(bw), np.array(bc), np.array(be)
    coef, rejected = _fit_centres(bw, bc, be, order, reject_sigma)
    domain = (float(wave.min()), float(wave.max()))
    # the fit's domain is the bins' range; re-express on the full wavelength range
    tr_bins = Trace(coef, (float(bw.min()), float(bw.max())), 0.0, 0.0)
    sample = np.linspace(domain[0], domain[1], 4 * (order + 1))
    coef_full = chebyshev.chebfit((2 * sample - sum(domain)) / (domain[1] - domain[0]),
                                  tr_bins.position_px(sample), order)
    resid = bc - Trace(coef_full, domain, 0.0, 0.0).position_px(bw)
    info = {"rms_px": float(np.std(resid[~rejected])) if (~rejected).sum() > 1 else 0.0,
            "n_bins_used": int((~rejected).sum()), "bin_wave_angstrom": bw,
            "bin_centre_px": bc, "bin_err_px": be, "bin_used": ~rejected}
    # the width from bins without saturated pixels (the median of a row whose
    # brightest pixels are masked is biased low, widening the profile)
    bs, bsat = np.asarray(bs), np.asarray(bsat, bool)
    fwhm = float(np.median(bs[~bsat])) if (~bsat).sum() >= 3 else float(np.median(bs))
    info["n_bins_saturated"] = int(bsat.sum())
    return Trace(coef_full, domain, fwhm, 0.0, "own", "", info)


def _straighten(data, good, shape_px):
    """Shift every column by -shape (rows), linear interpolation; masked pixels -> nan."""
    ny, n = data.shape
    rows = np.arange(ny, dtype=float)[:, None] + np.asarray(shape_px)[None, :]
    cols = np.broadcast_to(np.arange(n, dtype=float)[None, :], rows.shape)
    vals = map_coordinates(np.where(good, data, 0.0), [rows, cols], order=1, mode="constant",
                           cval=0.0)
    wts = map_coordinates(good.astype(float), [rows, cols], order=1, mode="constant", cval=0.0)
    return np.where(wts > 0.99, vals, np.nan)


def offset_trace(data, variance, mask, wave_angstrom, reference, y_guess_px, *,
                 fwhm_guess_px=3.0, window_fwhm=3.0, reference_name=""):
    """Trace a faint object by fitting only an offset to a reference trace's shape.

    Parameters
    ----------
    data, variance, mask : ndarray, shape (ny, n)
        Rectified sky-subtracted frame.
    wave_angstrom : ndarray, shape (n,)
    reference : Trace
        Bright trace whose shape is borrowed.
    y_guess_px : float
        Detected position of the faint object (rows, at the reference
        wavelength of ``reference``).

    Returns
    -------
    Trace or None
        Mode ``reference``; None when no peak is found near the guess.
    """
    data = np.asarray(data, float)
    wave = np.asarray(wave_angstrom, float)
    good = _good(data, variance, mask)
    shape = reference.position_px(wave) - reference.centre_px
    straight = _straighten(data, good, shape)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        prof = np.nanmedian(straight, axis=1)
    ny = data.shape[0]
    rows = np.arange(ny, dtype=float)
    ok = np.isfinite(prof)
    if ok.sum() < 8:
        return None
    prof = np.interp(rows, rows[ok], prof[ok])
    noise = _robust_sigma(prof) or 1.0
    half = max(int(np.ceil(window_fwhm * fwhm_guess_px)), 3)
    lo, hi = max(int(round(y_guess_px)) - half, 0), min(int(round(y_guess_px)) + half + 1, ny)
    popt, perr = _fit_gaussian(rows[lo:hi], prof[lo:hi], np.full(hi - lo, noise),
                               float(y_guess_px), fwhm_guess_px / _FWHM_PER_SIGMA)
    if popt is None or abs(popt[1] - y_guess_px) > 2 * fwhm_guess_px:
        return None
    offset = float(popt[1]) - reference.centre_px
    return reference.shifted(offset, mode="reference", reference=reference_name,
                             fwhm_px=float(popt[2] * _FWHM_PER_SIGMA),
                             info={"offset_err_px": float(perr[1]), "rms_px": float("nan"),
                                   "n_bins_used": 0})


def fixed_trace(wave_angstrom, y_px, fwhm_px, snr):
    """A trace at a constant row (no shape information)."""
    wave = np.asarray(wave_angstrom, float)
    return Trace(np.array([float(y_px)]), (float(wave.min()), float(wave.max())), float(fwhm_px),
                 float(snr), "fixed", "", {"rms_px": float("nan"), "n_bins_used": 0})


def trace_frame(data, variance, mask, wave_angstrom, *, fwhm_guess_px=3.0, snr_min=5.0,
                max_objects=10, own_trace_snr=30.0, n_bins=24, order=3, reject_sigma=3.0,
                min_bin_snr=5.0, reference=None, reference_name=""):
    """Find and trace every object of a rectified, sky-subtracted frame.

    Parameters
    ----------
    data, variance, mask : ndarray, shape (ny, n)
    wave_angstrom : ndarray, shape (n,)
    fwhm_guess_px, snr_min, max_objects
        Detection (see :func:`find_objects`).
    own_trace_snr : float
        Objects detected with a lower S/N borrow the shape of ``reference``
        (or, without one, of the brightest object traced on its own here).
    n_bins, order, reject_sigma, min_bin_snr
        Tracing (see :func:`trace_object`).
    reference : Trace, optional
        Bright reference (the standard star of the setup).
    reference_name : str
        Its name for the products (frame id of the standard).

    Returns
    -------
    list of Trace
        Sorted by decreasing detection S/N (aperture 1 first).
    """
    prof = spatial_profile(data, variance, mask)
    dets = find_objects(prof, fwhm_guess_px=fwhm_guess_px, snr_min=snr_min,
                        max_objects=max_objects)
    traces = []
    pending = []
    for d in dets:
        tr = None
        if d.snr >= own_trace_snr:
            tr = trace_object(data, variance, mask, wave_angstrom, d.position_px,
                              fwhm_guess_px=max(d.fwhm_px, 1.0), n_bins=n_bins, order=order,
                              reject_sigma=reject_sigma, min_bin_snr=min_bin_snr)
        if tr is None:
            pending.append(d)
            traces.append(None)
        else:
            traces.append(Trace(tr.coefficients, tr.domain_angstrom, tr.fwhm_px, d.snr, "own",
                                "", tr.info))
    own = [t for t in traces if t is not None]
    ref, ref_name = reference, reference_name
    if ref is None and own:
        ref, ref_name = own[0], "brightest object of this frame"
    for i, d in enumerate(dets):
        if traces[i] is not None:
            continue
        tr = None
        if ref is not None:
            tr = offset_trace(data, variance, mask, wave_angstrom, ref, d.position_px,
                              fwhm_guess_px=max(d.fwhm_px, 1.0), reference_name=ref_name)
        if tr is None:
            warnings.warn(f"object at row {d.position_px:.1f} (S/N {d.snr:.1f}) traced at a "
                          "constant row: no usable reference trace", TracingWarning)
            tr = fixed_trace(wave_angstrom, d.position_px, d.fwhm_px, d.snr)
        traces[i] = Trace(tr.coefficients, tr.domain_angstrom, tr.fwhm_px, d.snr, tr.mode,
                          tr.reference, tr.info)
    return traces


# -- table I/O -----------------------------------------------------------------------
def traces_to_table(traces, *, frame_id="", object_name=""):
    """Traces as an astropy Table (ECSV-ready), one row per aperture."""
    from astropy.table import Table

    max_n = max([len(t.coefficients) for t in traces], default=1)
    coefs = np.zeros((len(traces), max_n))
    for i, t in enumerate(traces):
        coefs[i, :len(t.coefficients)] = t.coefficients
    table = Table()
    table["frame_id"] = [frame_id] * len(traces)
    table["object"] = [object_name] * len(traces)
    table["aperture"] = np.arange(1, len(traces) + 1)
    table["mode"] = [t.mode for t in traces]
    table["reference"] = [t.reference or "none" for t in traces]  # no empty (masked) cells
    table["centre_px"] = [t.centre_px for t in traces]
    table["reference_wave_angstrom"] = [t.reference_wave_angstrom for t in traces]
    table["fwhm_px"] = [t.fwhm_px for t in traces]
    table["snr"] = [t.snr for t in traces]
    table["rms_px"] = [float(t.info.get("rms_px", np.nan)) for t in traces]
    table["domain_lo_angstrom"] = [t.domain_angstrom[0] for t in traces]
    table["domain_hi_angstrom"] = [t.domain_angstrom[1] for t in traces]
    table["order"] = [len(t.coefficients) - 1 for t in traces]
    for k in range(max_n):
        table[f"coef_{k}"] = coefs[:, k]
    table.meta["description"] = ("Trace centres (rows of the rectified frame) as Chebyshev "
                                 "series coef_0..coef_order in wavelength mapped from the "
                                 "domain to [-1, 1]")
    return table


def traces_from_table(table):
    """Inverse of :func:`traces_to_table`."""
    out = []
    for row in table:
        coef = np.array([row[f"coef_{k}"] for k in range(int(row["order"]) + 1)], float)
        out.append(Trace(coef,
                         (float(row["domain_lo_angstrom"]), float(row["domain_hi_angstrom"])),
                         float(row["fwhm_px"]), float(row["snr"]), str(row["mode"]),
                         "" if str(row["reference"]) in ("none", "--") else str(row["reference"]),
                         {"rms_px": float(row["rms_px"])}))
    return out
