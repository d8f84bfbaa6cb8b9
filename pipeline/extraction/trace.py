"""Trace objects along the dispersion on the rectified frame.

Detection (:mod:`pipeline.extraction.detect`) gives each object's row, FWHM and
detection S/N. Bright objects: the frame is cut into ``n_bins`` wavelength
bins; in each a median spatial profile is fitted by a Gaussian; the centres are
fitted against wavelength by a Chebyshev polynomial with iterative sigma
clipping (:class:`astropy.modeling.fitting.FittingWithOutlierRemoval`).
Faint objects (detection S/N below ``own_trace_snr``, or too few usable bins)
borrow the shape of a bright reference trace (the standard star of the same
setup): the frame is shifted column by column by the reference shape, the
straightened frame is collapsed, and only an offset is fitted. Without a
reference, a faint object gets a constant position (``mode='fixed'``).
"""

import warnings
from dataclasses import dataclass, field

import numpy as np
from numpy.polynomial import chebyshev
from scipy.ndimage import map_coordinates

from pipeline.core.errors import ExtractionError, PipelineWarning
from pipeline.core.maskbits import MaskBit
from pipeline.extraction.detect import (FWHM_PER_SIGMA as _FWHM_PER_SIGMA, find_objects,
                                        fit_gaussian, good_pixels, review_candidates,
                                        robust_sigma, spatial_profile)

__all__ = ["Trace", "trace_object", "offset_trace", "fixed_trace", "trace_frame",
           "trace_detections",
           "traces_to_table", "traces_from_table", "TracingWarning"]


class TracingWarning(PipelineWarning):
    """An object could not be traced on its own, or apertures had to be narrowed."""


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
    good = good_pixels(data, variance, mask)
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
        popt, perr = fit_gaussian(rows[lo:hi], prof, err, guess, sigma0)
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
    good = good_pixels(data, variance, mask)
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
    noise = robust_sigma(prof) or 1.0
    half = max(int(np.ceil(window_fwhm * fwhm_guess_px)), 3)
    lo, hi = max(int(round(y_guess_px)) - half, 0), min(int(round(y_guess_px)) + half + 1, ny)
    popt, perr = fit_gaussian(rows[lo:hi], prof[lo:hi], np.full(hi - lo, noise),
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
                min_bin_snr=5.0, residual_factor=1.5, min_fwhm_seeing=0.5, reference=None,
                reference_name=""):
    """Find and trace every object of a rectified, sky-subtracted frame.

    Parameters
    ----------
    data, variance, mask : ndarray, shape (ny, n)
    wave_angstrom : ndarray, shape (n,)
    fwhm_guess_px, snr_min, max_objects
        Detection (see :func:`pipeline.extraction.detect.find_objects`).
    residual_factor, min_fwhm_seeing
        Which candidates are sources (see
        :func:`pipeline.extraction.detect.review_candidates`); the others are
        reported by a TracingWarning and not traced.
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
        Sorted by decreasing detection S/N.
    """
    prof = spatial_profile(data, variance, mask)
    review = review_candidates(prof, find_objects(prof, fwhm_guess_px=fwhm_guess_px,
                                                  snr_min=snr_min, max_objects=max_objects),
                               fwhm_guess_px=fwhm_guess_px, residual_factor=residual_factor,
                               min_fwhm_seeing=min_fwhm_seeing)
    for d, reason in review.rejected:
        warnings.warn(f"candidate at row {d.position_px:.1f} (detection S/N {d.snr:.1f}) is "
                      f"not a source: {reason}", TracingWarning)
    return trace_detections(data, variance, mask, wave_angstrom, review.objects,
                            own_trace_snr=own_trace_snr, n_bins=n_bins, order=order,
                            reject_sigma=reject_sigma, min_bin_snr=min_bin_snr,
                            reference=reference, reference_name=reference_name)


def trace_detections(data, variance, mask, wave_angstrom, detections, *, own_trace_snr=30.0,
                     n_bins=24, order=3, reject_sigma=3.0, min_bin_snr=5.0, reference=None,
                     reference_name=""):
    """Trace the given objects of a rectified, sky-subtracted frame.

    Parameters are those of :func:`trace_frame`; ``detections`` (list of
    :class:`pipeline.extraction.detect.Detection`) are the objects, in the order the
    traces are returned.

    Returns
    -------
    list of Trace
    """
    dets = list(detections)
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
def traces_to_table(traces, *, frame_id="", object_name="", roles=None, labels=None):
    """Traces as an astropy Table (ECSV-ready), one row per object.

    ``roles`` (``target``/``other``) and ``labels`` (``target``, ``other1``, ...) default
    to the first trace being the target.
    """
    from astropy.table import Table

    max_n = max([len(t.coefficients) for t in traces], default=1)
    coefs = np.zeros((len(traces), max_n))
    for i, t in enumerate(traces):
        coefs[i, :len(t.coefficients)] = t.coefficients
    table = Table()
    table["frame_id"] = [frame_id] * len(traces)
    table["object"] = [object_name] * len(traces)
    if roles is None:
        roles = ["target"] + ["other"] * max(len(traces) - 1, 0)
    if labels is None:
        labels = ["target"] + [f"other{k}" for k in range(1, len(traces))]
    table["role"] = [str(r) for r in roles][:len(traces)]
    table["label"] = [str(lab) for lab in labels][:len(traces)]
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
