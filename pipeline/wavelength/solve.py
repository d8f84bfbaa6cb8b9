"""Wavelength solution seeded by the physical grating model: identification, 1-D and 2-D fits.

No manual line identification: the grating model (:mod:`pipeline.wavelength.grating`)
predicts where each line of the lit lamps lands, and the solver

1. **searches** the grating tilt and camera focal length around their nominal
   values: for every trial focal length and every pair (detected line, listed
   line) the grating equation gives, in closed form, the tilt that puts the
   listed wavelength on the detected pixel; the tilt where most pairs agree
   wins (a Hough-style vote, robust to missing and extra lines);
2. **matches** detected and predicted lines one-to-one (mutual nearest
   neighbours within a tolerance) using only detected lines without flags and
   listed lines with no other lit line within a few FWHM;
3. **fits** the model's free parameters (tilt, focal length and the
   position of the camera axis on the detector, the latter with a weak prior)
   by robust non-linear least squares, then a low-order Chebyshev correction in
   wavelength with iterative sigma clipping (astropy ``sigma_clip``) on the
   normalised residuals, rematching with the refined solution;
4. **traces** each identified line along the slit (vectorised Gaussian fits in
   bands of rows, started from a cross-correlation shift per band) and fits
   the line tilt and curvature as a polynomial ``Q(x, y)`` so that
   ``lambda(x, y) = lambda_1D(x + Q(x, y))`` over the whole detector.

A setup whose identification fails raises
:class:`~pipeline.core.errors.WavelengthSolutionError` with the reason; no solution
is written then.

The product (``solve_wavelength_file``) is a FITS file whose PRIMARY HDU is the
dense map ``lambda(y, x)`` (float64, Angstrom, air) on the calibrated frame's
pixels. Its header holds the fitted physical model as FITS WCS (Greisen et al.
2006, ``AWAV-GRA``, for the reference row) with the Chebyshev correction and
the line-tilt polynomial beside it (keywords listed in :data:`HEADER_KEYWORDS`);
extension ``LINES`` lists the identified lines and ``TRACE`` the traced points.

References
----------
Greisen, E. W., Calabretta, M. R., Valdes, F. G., & Allen, S. L. 2006, A&A 446, 747.
"""

import math
import warnings
from dataclasses import dataclass, field
from functools import partial
from pathlib import Path

import numpy as np
from astropy.stats import sigma_clip
from numpy.polynomial import chebyshev as cheb
from scipy import optimize

from pipeline.wavelength import grating as gr
from pipeline.core import maskbits
from pipeline.core.constants import SPEED_OF_LIGHT_KM_S
from pipeline.wavelength.arclines import LineFlag, measure_lines, sum_rows
from pipeline.core.errors import ArcQualityWarning, InputFileError, WavelengthSolutionError

__all__ = [
    "SPEED_OF_LIGHT_KM_S", "HEADER_KEYWORDS", "WavelengthSolution1D", "LineTraces",
    "WavelengthSolution2D", "isolated_lines", "merge_unresolved", "search_grating_parameters", "match_lines",
    "fit_grating_parameters", "solve_1d", "trace_lines", "fit_line_tilt", "predicted_positions",
    "solve_wavelength",
    "solution_header", "solve_wavelength_file", "load_wavelength_map", "WavelengthMap",
]

#: km/s (exact, SI definition)

#: Keywords written in the solution header (besides WCS and provenance).
HEADER_KEYWORDS = {
    "SETUP": "instrument setup id",
    "ARCFRAME": "calibrated arc frame the solution comes from",
    "WSTILT": "[deg] fitted grating tilt", "WSTILTE": "[deg] its 1-sigma uncertainty",
    "WSTILT0": "[deg] nominal (header) tilt",
    "WSFOCAL": "[mm] fitted camera focal length", "WSFOCALE": "[mm] its uncertainty",
    "WSFOCAL0": "[mm] nominal focal length",
    "WSXCEN": "[px] fitted camera-axis pixel (binned, 0-based)", "WSXCENE": "[px] uncertainty",
    "WSXCEN0": "[px] nominal camera-axis pixel", "WSBIN": "binning along the dispersion",
    "WSRMSA": "[Angstrom] rms of the 1-D fit", "WSRMSP": "[px] rms of the 1-D fit",
    "WSRMSV": "[km/s] rms of the 1-D fit", "WSNLINE": "lines used in the 1-D fit",
    "WSNREJ": "matched lines rejected by clipping", "WSNDET": "lines detected",
    "WSYREF": "[px] reference row (0-based) of the 1-D fit",
    "WCPOLY": "correction type (chebyshev in x, Angstrom)", "WCDEG": "correction degree",
    "WCDOM0": "[px] correction domain start", "WCDOM1": "[px] correction domain end",
    "WCCn": "[Angstrom] correction coefficient n",
    "WQXDEG": "line-tilt polynomial degree in x", "WQYDEG": "line-tilt degree in y",
    "WQXREF": "[px] x centre of Q", "WQXSCL": "[px] x scale of Q",
    "WQYSCL": "[px] y scale of Q", "WQij": "[px] coefficient of xn^i yn^j (j >= 1)",
    "WS2DRMSP": "[px] rms of the 2-D fit", "WS2DRMSA": "[Angstrom] rms of the 2-D fit",
    "WS2DNPT": "traced points used in the 2-D fit", "WS2DNLN": "lines traced",
}


# --------------------------------------------------------------------------------------
# results
# --------------------------------------------------------------------------------------

@dataclass(frozen=True)
class WavelengthSolution1D:
    """Wavelength along the reference row: fitted grating model plus a Chebyshev correction.

    Attributes
    ----------
    model : GratingModel
        Fitted physical model (tilt, focal length, camera-axis pixel).
    nominal : GratingModel
        The starting model from the config and the header.
    correction_coeffs : ndarray, shape (degree + 1,), Angstrom
        Chebyshev coefficients of ``lambda - lambda_model`` over ``domain_px``.
    domain_px : (float, float)
        Domain of the Chebyshev series (pixels mapped to -1..1).
    nx : int
        Pixels along the dispersion.
    reference_row : float
        Row (0-based) the 1-D solution describes.
    lines : dict of ndarray
        Matched lines: ``x_px, x_err_px, wave_angstrom, species, used, residual_angstrom,
        residual_px, detected_index``.
    rms_angstrom, rms_px, rms_km_s : float
        Root mean square of the residuals of the used lines.
    n_used, n_rejected : int
    parameter_errors : dict
        1-sigma uncertainties of ``tilt_deg``, ``focal_length_mm``, ``center_px``.
    info : dict
        Search and fit diagnostics.
    """

    model: gr.GratingModel
    nominal: gr.GratingModel
    correction_coeffs: np.ndarray
    domain_px: tuple
    nx: int
    reference_row: float
    lines: dict
    rms_angstrom: float
    rms_px: float
    rms_km_s: float
    n_used: int
    n_rejected: int
    parameter_errors: dict
    info: dict = field(default_factory=dict)

    def correction(self, x_px):
        """The Chebyshev correction (Angstrom) at ``x_px``."""
        return cheb.chebval(_to_unit(np.asarray(x_px, dtype=float), self.domain_px),
                            self.correction_coeffs)

    def wavelength(self, x_px):
        """Air wavelength (Angstrom) at ``x_px`` on the reference row."""
        return self.model.wavelength(x_px) + self.correction(x_px)

    def dispersion(self, x_px):
        """``d lambda / dx`` (Angstrom per pixel) of the full 1-D solution."""
        x = np.asarray(x_px, dtype=float)
        half = 0.5 * (self.domain_px[1] - self.domain_px[0])
        dcorr = cheb.chebval(_to_unit(x, self.domain_px), cheb.chebder(self.correction_coeffs)) / half
        return self.model.dispersion(x) + dcorr

    def pixel(self, wave_angstrom):
        """Pixel of ``wave_angstrom`` on the reference row (Newton inversion)."""
        return _solution_pixels(self.model, self.correction_coeffs, self.domain_px,
                                np.asarray(wave_angstrom, dtype=float))


@dataclass(frozen=True)
class LineTraces:
    """Positions of identified lines measured in bands of rows.

    Attributes
    ----------
    wave_angstrom : ndarray, shape (n_lines,)
    x_ref_px : ndarray, shape (n_lines,)
        Position on the reference row (from the 1-D measurement).
    y_px : ndarray, shape (n_bands,)
        Mean row of each band.
    x_px, x_err_px : ndarray, shape (n_bands, n_lines)
        Measured centroids and uncertainties (nan where not measured).
    ok : ndarray of bool, shape (n_bands, n_lines)
    info : dict
    """

    wave_angstrom: np.ndarray
    x_ref_px: np.ndarray
    y_px: np.ndarray
    x_px: np.ndarray
    x_err_px: np.ndarray
    ok: np.ndarray
    info: dict = field(default_factory=dict)


@dataclass(frozen=True)
class WavelengthSolution2D:
    """``lambda(x, y) = lambda_1D(x + Q(x, y))`` over the detector.

    ``Q(x, y) = sum_{i<=deg_x, 1<=j<=deg_y} q_ij xn^i yn^j`` with
    ``xn = (x - x_ref) / x_scale`` and ``yn = (y - y_ref) / y_scale``; ``Q = 0``
    on the reference row.

    Attributes
    ----------
    solution_1d : WavelengthSolution1D
    q_coeffs : ndarray, shape (deg_x + 1, deg_y), px
        ``q_coeffs[i, j - 1]`` multiplies ``xn^i yn^j``.
    x_ref, x_scale, y_ref, y_scale : float, px
    shape : (int, int)
        ``(ny, nx)`` of the frame.
    traces : LineTraces
    used : ndarray of bool, shape (n_bands, n_lines)
        Traced points kept by the 2-D fit.
    residual_px : ndarray, shape (n_bands, n_lines)
        Measured minus model position (px), nan where not measured.
    rms_px, rms_angstrom : float
    info : dict
    """

    solution_1d: WavelengthSolution1D
    q_coeffs: np.ndarray
    x_ref: float
    x_scale: float
    y_ref: float
    y_scale: float
    shape: tuple
    traces: LineTraces
    used: np.ndarray
    residual_px: np.ndarray
    rms_px: float
    rms_angstrom: float
    info: dict = field(default_factory=dict)

    def shift(self, x_px, y_px):
        """``Q(x, y)`` in pixels."""
        xn = (np.asarray(x_px, dtype=float) - self.x_ref) / self.x_scale
        yn = (np.asarray(y_px, dtype=float) - self.y_ref) / self.y_scale
        return _q_eval(self.q_coeffs, xn, yn)

    def wavelength(self, x_px, y_px):
        """Air wavelength (Angstrom) at detector position(s) ``(x_px, y_px)``."""
        x = np.asarray(x_px, dtype=float)
        return self.solution_1d.wavelength(x + self.shift(x, y_px))

    def wavelength_map(self):
        """Dense map ``lambda(y, x)`` at every pixel centre, shape ``(ny, nx)``, float64.

        The 1-D solution is tabulated every 1/8 pixel and interpolated linearly
        (interpolation error below 1e-6 A for smooth dispersion).
        """
        ny, nx = self.shape
        x = np.arange(nx, dtype=float)
        xn = (x - self.x_ref) / self.x_scale
        yn = (np.arange(ny, dtype=float) - self.y_ref) / self.y_scale
        powers_x = np.vander(xn, self.q_coeffs.shape[0], increasing=True)    # (nx, dx+1)
        per_j = powers_x @ self.q_coeffs                                       # (nx, dy)
        powers_y = np.vander(yn, self.q_coeffs.shape[1] + 1, increasing=True)[:, 1:]  # (ny, dy)
        shift = powers_y @ per_j.T                                             # (ny, nx)
        lo = min(-1.0, float(np.min(shift)) - 1.0)
        hi = nx - 1 + max(1.0, float(np.max(shift)) + 1.0)
        grid = np.arange(math.floor(lo), math.ceil(hi) + 0.125, 0.125)
        table = self.solution_1d.wavelength(grid)
        return np.interp(shift + x[None, :], grid, table)


def _to_unit(x, domain):
    lo, hi = domain
    return (2.0 * x - (lo + hi)) / (hi - lo)


def _q_eval(coeffs, xn, yn):
    xn, yn = np.broadcast_arrays(np.asarray(xn, dtype=float), np.asarray(yn, dtype=float))
    total = np.zeros(xn.shape)
    for i in range(coeffs.shape[0]):
        for j in range(1, coeffs.shape[1] + 1):
            total = total + coeffs[i, j - 1] * xn ** i * yn ** j
    return total


# --------------------------------------------------------------------------------------
# identification
# --------------------------------------------------------------------------------------

def isolated_lines(wave_angstrom, species, intensity, *, min_separation_angstrom,
                   faint_ratio=0.03):
    """Listed lines with no lit neighbour that could pull a measured centroid.

    A line is *not* isolated when another listed line lies within
    ``min_separation_angstrom``, unless that neighbour is of the same species and
    fainter than ``faint_ratio`` times the line (relative intensities are
    comparable only within a species; lines of other species always count).

    Parameters
    ----------
    wave_angstrom : ndarray, shape (n,), Angstrom (sorted or not)
    species : ndarray of str, shape (n,)
    intensity : ndarray, shape (n,)
        ``nan`` = unknown (such a neighbour always counts).
    min_separation_angstrom : float
    faint_ratio : float

    Returns
    -------
    ndarray of bool, shape (n,)
    """
    w = np.asarray(wave_angstrom, dtype=float)
    sp = np.asarray(species)
    inten = np.asarray(intensity, dtype=float)
    close = np.abs(w[:, None] - w[None, :]) < min_separation_angstrom
    np.fill_diagonal(close, False)
    same = sp[:, None] == sp[None, :]
    with np.errstate(invalid="ignore"):
        faint = same & np.isfinite(inten[:, None]) & np.isfinite(inten[None, :]) & (
            inten[None, :] < faint_ratio * inten[:, None])
    return ~np.any(close & ~faint, axis=1)


def merge_unresolved(line_list, *, max_separation_angstrom):
    """Merge same-species lines closer than ``max_separation_angstrom`` into one.

    Components much closer than the resolution make one profile whose centroid
    is the intensity-weighted mean wavelength; the merged line gets that
    wavelength, the summed intensity, the sources joined and a note. Groups with
    an unknown intensity are left as they are (and so count as blends).

    Parameters
    ----------
    line_list : LineList
    max_separation_angstrom : float

    Returns
    -------
    LineList
    """
    from pipeline.wavelength.linelists import LineList

    w = line_list.wave_air_angstrom
    if len(line_list) < 2:
        return line_list
    order = np.argsort(w, kind="stable")
    groups, current = [], [order[0]]
    for i in order[1:]:
        j = current[-1]
        if (w[i] - w[j] < max_separation_angstrom
                and line_list.species[i] == line_list.species[j]):
            current.append(i)
        else:
            groups.append(current)
            current = [i]
    groups.append(current)
    cols = {k: [] for k in ("species", "wave", "inten", "source", "note")}
    for g in groups:
        inten = line_list.relative_intensity[g]
        if len(g) == 1 or not np.all(np.isfinite(inten)):
            for i in g:
                cols["species"].append(line_list.species[i])
                cols["wave"].append(w[i])
                cols["inten"].append(line_list.relative_intensity[i])
                cols["source"].append(line_list.source[i])
                cols["note"].append(line_list.note[i])
            continue
        cols["species"].append(line_list.species[g[0]])
        cols["wave"].append(float(np.sum(w[g] * inten) / np.sum(inten)))
        cols["inten"].append(float(np.sum(inten)))
        cols["source"].append(";".join(dict.fromkeys(";".join(line_list.source[g]).split(";"))))
        cols["note"].append("unresolved blend of " + ", ".join(f"{v:.4f}" for v in w[g])
                            + " (intensity-weighted)")
    return LineList(np.array(cols["species"], dtype=str), np.array(cols["wave"], dtype=float),
                    np.array(cols["inten"], dtype=float), np.array(cols["source"], dtype=str),
                    np.array(cols["note"], dtype=str), dict(line_list.info))


def _tilt_for(wave_angstrom, x_px, model, focal_length_mm):
    """Tilt (deg) that puts ``wave`` on pixel ``x`` for a given focal length (closed form).

    ``sin(t + D/2) + sin(t - D/2 + g) = 2 sin(t + g/2) cos((D - g)/2)`` with
    ``g = atan((x - x_c) p / f)``.
    """
    g = np.arctan((x_px - model.center_px) * model.pixel_mm / focal_length_mm)
    big_d = math.radians(model.camera_collimator_angle_deg)
    s = model.order * wave_angstrom / (2 * model.groove_spacing_angstrom * np.cos((big_d - g) / 2))
    with np.errstate(invalid="ignore"):
        return np.degrees(np.arcsin(np.where(np.abs(s) <= 1, s, np.nan)) - g / 2)


def search_grating_parameters(x_detected_px, wave_listed_angstrom, nominal, nx_px, *,
                              tilt_range_deg=0.6, focal_range_fraction=0.035,
                              tolerance_px=1.5, n_candidates=5):
    """Vote for the grating tilt and focal length that best explain the detected lines.

    For each trial focal length (steps that move the detector ends by at most
    ``tolerance_px / 2``) every pair (detected line, listed line) gives the tilt
    that makes them coincide; the number of pairs agreeing within the tilt
    equivalent of ``tolerance_px`` is the score.

    Parameters
    ----------
    x_detected_px : ndarray, shape (n_det,), px
    wave_listed_angstrom : ndarray, shape (n_list,), Angstrom
    nominal : GratingModel
    nx_px : int
    tilt_range_deg : float
        Search ``nominal.tilt_deg +- tilt_range_deg``.
    focal_range_fraction : float
        Search ``f (1 +- focal_range_fraction)``.
    tolerance_px : float
    n_candidates : int
        Number of distinct best (tilt, focal length) pairs returned.

    Returns
    -------
    list of dict
        ``score`` (number of coincidences), ``tilt_deg``, ``focal_length_mm``, sorted
        by decreasing score.
    """
    xd = np.asarray(x_detected_px, dtype=float)
    wl = np.asarray(wave_listed_angstrom, dtype=float)
    if xd.size == 0 or wl.size == 0:
        return []
    f0 = nominal.focal_length_mm
    step = max(tolerance_px / (0.5 * nx_px) / 2, 1e-5)
    n_steps = int(math.ceil(focal_range_fraction / step))
    focals = f0 * (1 + step * np.arange(-n_steps, n_steps + 1))
    # tilt equivalent of the tolerance: d lambda/d t over d lambda/dx at the centre
    a, b = math.radians(nominal.alpha_deg), math.radians(nominal.beta_center_deg)
    dlam_dt = nominal.groove_spacing_angstrom * (math.cos(a) + math.cos(b)) / nominal.order
    px_per_rad = dlam_dt / float(nominal.dispersion(nominal.center_px))
    half = 0.5 * tolerance_px / px_per_rad * 180 / math.pi
    results = []
    t0 = nominal.tilt_deg
    for f in focals:
        tilts = _tilt_for(wl[None, :], xd[:, None], nominal, f).ravel()
        tilts = tilts[np.isfinite(tilts) & (np.abs(tilts - t0) <= tilt_range_deg + half)]
        if tilts.size == 0:
            continue
        tilts.sort()
        lo = np.searchsorted(tilts, tilts - half, side="left")
        hi = np.searchsorted(tilts, tilts + half, side="right")
        counts = hi - lo
        # a few distinct local maxima per focal length
        order = np.argsort(-counts, kind="stable")
        taken = []
        for k in order:
            if len(taken) >= n_candidates or counts[k] < 3:
                break
            t = float(np.median(tilts[lo[k]:hi[k]]))
            if abs(t - t0) > tilt_range_deg or any(abs(t - u) < 4 * half for u in taken):
                continue
            taken.append(t)
            results.append({"score": int(counts[k]), "tilt_deg": t, "focal_length_mm": float(f)})
    results.sort(key=lambda r: -r["score"])
    distinct = []
    for r in results:
        if any(abs(r["tilt_deg"] - d["tilt_deg"]) < 4 * half
               and abs(r["focal_length_mm"] - d["focal_length_mm"]) < 4 * step * f0
               for d in distinct):
            continue
        distinct.append(r)
        if len(distinct) >= n_candidates:
            break
    for r in distinct:
        r["tilt_half_window_deg"] = half
    return distinct


def match_lines(x_detected_px, x_predicted_px, *, tolerance_px):
    """One-to-one matches: mutual nearest neighbours closer than ``tolerance_px``.

    Returns
    -------
    det_index, pred_index : ndarray of int
    """
    xd = np.asarray(x_detected_px, dtype=float)
    xp = np.asarray(x_predicted_px, dtype=float)
    ok_p = np.isfinite(xp)
    if xd.size == 0 or not ok_p.any():
        return np.zeros(0, int), np.zeros(0, int)
    dist = np.abs(xd[:, None] - np.where(ok_p, xp, np.inf)[None, :])
    nearest_p = np.argmin(dist, axis=1)
    nearest_d = np.argmin(dist, axis=0)
    d_idx = np.arange(xd.size)
    mutual = nearest_d[nearest_p] == d_idx
    close = dist[d_idx, nearest_p] < tolerance_px
    keep = mutual & close
    return d_idx[keep], nearest_p[keep]


def fit_grating_parameters(x_px, x_err_px, wave_angstrom, model, *, correction_terms=(),
                           domain_px=None, center_prior_px=10.0, center_nominal_px=None,
                           fit_center=True, loss_scale_px=0.3, keep=None):
    """Least-squares fit of tilt, focal length, camera-axis pixel (and correction terms).

    The solution is ``lambda(x) = lambda_model(x) + sum_k c_k T_k(u)`` with
    Chebyshev polynomials ``T_k`` of the listed degrees over ``domain_px``. The
    residual of line ``i`` is ``(lambda_i - lambda(x_i)) / (|d lambda/dx| s_i)``
    (pixels over their uncertainty), minimised with a soft-L1 loss of scale
    ``loss_scale_px``, plus ``((x_c - x_c0) / center_prior_px)^2`` with
    ``x_c0 = center_nominal_px``: the camera-axis position is nearly degenerate
    with the tilt, so a weak prior keeps it near the nominal value. The physical model already has a shift, a scale and a
    curvature, so the correction should start at degree 3.

    Parameters
    ----------
    x_px, x_err_px, wave_angstrom : ndarray, shape (n,)
    model : GratingModel
        Starting model.
    correction_terms : sequence of int
        Chebyshev degrees fitted with the model (e.g. ``(3, 4)``).
    domain_px : (float, float)
        Domain of the Chebyshev series.
    center_prior_px : float
        1-sigma width of the prior on the camera-axis pixel.
    center_nominal_px : float, optional
        Centre of that prior (default: the starting model's ``center_px``).
    fit_center : bool
    loss_scale_px : float
    keep : ndarray of bool, optional
        Lines to use (default all).

    Returns
    -------
    model : GratingModel
    coeffs : ndarray, shape (max(correction_terms) + 1,) or (1,), Angstrom
        Chebyshev coefficients (zero for degrees not fitted).
    errors : dict
        1-sigma uncertainties of ``tilt_deg``, ``focal_length_mm``, ``center_px``
        (from the Jacobian, scaled by the reduced chi^2 when it exceeds 1).
    info : dict
    """
    x = np.asarray(x_px, dtype=float)
    s = np.maximum(np.asarray(x_err_px, dtype=float), 1e-3)
    w = np.asarray(wave_angstrom, dtype=float)
    sel = np.ones(x.size, bool) if keep is None else np.asarray(keep, bool)
    x, s, w = x[sel], s[sel], w[sel]
    terms = tuple(int(k) for k in correction_terms)
    n_coef = (max(terms) + 1) if terms else 1
    domain = domain_px if domain_px is not None else (float(np.min(x)), float(np.max(x)))
    u = _to_unit(x, domain)
    basis = np.stack([cheb.chebval(u, np.eye(n_coef)[k]) for k in terms], axis=1) if terms \
        else np.zeros((x.size, 0))
    c0 = model.center_px
    prior_offset = 0.0 if center_nominal_px is None else c0 - float(center_nominal_px)
    t_scale = 0.01
    f_scale = model.focal_length_mm * 1e-3
    n_phys = 3 if fit_center else 2
    disp0 = np.abs(model.dispersion(x))

    def unpack(p):
        return model.with_changes(tilt_deg=model.tilt_deg + p[0] * t_scale,
                                  focal_length_mm=model.focal_length_mm + p[1] * f_scale,
                                  center_px=c0 + (p[2] if fit_center else 0.0))

    def resid(p):
        m = unpack(p)
        lam = m.wavelength(x) + basis @ p[n_phys:]
        r = (w - lam) / (disp0 * s)
        if fit_center:
            r = np.append(r, (p[2] + prior_offset) / center_prior_px)
        return r

    def jac(p):
        m = unpack(p)
        beta = m.beta_rad(x)
        gamma = beta - math.radians(m.beta_center_deg)
        k = m.groove_spacing_angstrom / m.order * np.cos(beta)
        cos2 = np.cos(gamma) ** 2
        d_t = m.groove_spacing_angstrom / m.order * (
            math.cos(math.radians(m.alpha_deg)) + np.cos(beta)) * math.radians(t_scale)
        d_f = -k * cos2 * (x - m.center_px) * m.pixel_mm / m.focal_length_mm ** 2 * f_scale
        cols = [d_t, d_f]
        if fit_center:
            cols.append(-k * cos2 * m.pixel_mm / m.focal_length_mm)
        j = -np.column_stack(cols + [basis]) / (disp0 * s)[:, None]
        if fit_center:
            prior = np.zeros((1, j.shape[1]))
            prior[0, 2] = 1.0 / center_prior_px
            j = np.vstack([j, prior])
        return j

    p0 = np.zeros(n_phys + len(terms))
    res = optimize.least_squares(resid, p0, jac=jac, loss="soft_l1",
                                 f_scale=loss_scale_px / float(np.median(s)), method="trf")
    fitted = unpack(res.x)
    coeffs = np.zeros(n_coef)
    for k, c in zip(terms, res.x[n_phys:]):
        coeffs[k] = c
    errors = {"tilt_deg": math.nan, "focal_length_mm": math.nan, "center_px": math.nan}
    jac = res.jac
    try:
        cov = np.linalg.inv(jac.T @ jac)
        r_data = resid(res.x)[:x.size]
        scale = max(1.0, float(np.sum(r_data ** 2)) / max(x.size - jac.shape[1], 1))
        sd = np.sqrt(np.diag(cov) * scale)
        errors["tilt_deg"] = float(sd[0] * t_scale)
        errors["focal_length_mm"] = float(sd[1] * f_scale)
        if fit_center:
            errors["center_px"] = float(sd[2])
    except np.linalg.LinAlgError:
        pass
    return fitted, coeffs, errors, {"nfev": int(res.nfev), "status": int(res.status),
                                    "cost": float(res.cost)}


def _solution_pixels(model, coeffs, domain, wave_angstrom):
    """Pixels of ``wave`` for model + Chebyshev correction (Newton from the model)."""
    x = model.pixel(wave_angstrom)
    for _ in range(5):
        lam = model.wavelength(x) + cheb.chebval(_to_unit(x, domain), coeffs)
        x = x - (lam - wave_angstrom) / model.dispersion(x)
    return x


def solve_1d(lines, line_list, nominal, nx_px, *, reference_row=0.0, tilt_range_deg=0.6,
             focal_range_fraction=0.035, search_tolerance_px=1.5, match_tolerance_px=2.0,
             final_tolerance_px=1.0, isolation_fwhm=2.0, faint_neighbour_ratio=0.03,
             merge_fwhm=0.1, center_prior_mm=0.15, correction_degree=3, correction_min_degree=3,
             clip_sigma=3.0, clip_iterations=5, centroid_floor_px=0.01, min_lines=8,
             max_rms_px=0.3, min_matched_fraction=0.3, ambiguity_ratio=0.8, n_search_lines=40,
             warn_line_coverage_fraction=0.5):
    """Identify the arc lines and fit the 1-D wavelength solution of the reference row.

    Parameters
    ----------
    lines : ArcLines
        Detected lines (:func:`pipeline.wavelength.arclines.find_arc_lines`).
    line_list : LineList
        Lines of the lit species (:func:`pipeline.wavelength.linelists.read_line_list`).
    nominal : GratingModel
        Nominal optics with the header tilt.
    nx_px : int
        Pixels along the dispersion.
    reference_row : float
        Row the measured lines belong to (recorded in the result).
    tilt_range_deg, focal_range_fraction : float
        Search ranges around the nominal tilt and focal length.
    search_tolerance_px : float
        Coincidence tolerance of the vote.
    match_tolerance_px : float
        Matching tolerance with the searched model; ``final_tolerance_px`` with the
        fitted solution (or 5 rms, whichever is larger).
    isolation_fwhm : float
        Listed lines with a lit neighbour closer than this many FWHM are not used.
    faint_neighbour_ratio : float
        Same-species neighbours fainter than this fraction do not count.
    merge_fwhm : float
        Same-species lines closer than this many FWHM are merged into one line at
        their intensity-weighted wavelength (:func:`merge_unresolved`).
    center_prior_mm : float
        1-sigma prior width on the position of the camera axis on the detector, in mm
        (divided by the binned pixel size for the fit).
    correction_degree : int
        Highest degree of the Chebyshev correction (0-7).
    correction_min_degree : int
        Lowest correction degree fitted; below 3 the correction is degenerate with
        the physical parameters (shift, scale, curvature), so the default is 3.
    clip_sigma, clip_iterations : float, int
        Sigma clipping of the normalised residuals.
    centroid_floor_px : float
        Added in quadrature to each centroid uncertainty (systematic floor).
    min_lines : int
        Fewest lines a solution may rest on.
    max_rms_px : float
        Largest acceptable rms of the used lines.
    min_matched_fraction : float
        Fewest matched lines as a fraction of the clean detected lines.
    ambiguity_ratio : float
        Fail when a different solution matches at least this fraction of the lines
        of the best one.
    n_search_lines : int
        Strongest detected lines used in the vote.
    warn_line_coverage_fraction : float
        Warn (:class:`~pipeline.core.errors.ArcQualityWarning`) when the used lines span
        less than this fraction of the detector: beyond them the solution is an
        extrapolation of the grating model.

    Returns
    -------
    WavelengthSolution1D

    Raises
    ------
    WavelengthSolutionError
        When too few lines match, the fit is poor, or the identification is ambiguous.
    """
    nx = int(nx_px)
    if not 0 <= int(correction_degree) <= 7:
        raise ValueError(f"`correction_degree` must be 0..7, got {correction_degree!r}")
    if int(correction_min_degree) < 0:
        raise ValueError(f"`correction_min_degree` must be >= 0, got {correction_min_degree!r}")
    usable = (lines.flags & LineFlag.FIT_FAILED) == 0
    usable &= np.isfinite(lines.x_px) & (lines.x_px > -0.5) & (lines.x_px < nx - 0.5)
    clean = usable & (lines.flags == 0)
    n_clean = int(clean.sum())
    setup = (f"tilt {nominal.tilt_deg:.3f} deg, f {nominal.focal_length_mm:g} mm, "
             f"{len(line_list)} listed lines of {', '.join(sorted(set(line_list.species))) or 'none'}")
    if n_clean < min_lines:
        raise WavelengthSolutionError(
            f"only {n_clean} clean arc lines detected (of {len(lines)}; need >= {min_lines}) "
            f"for {setup}; check the lamps, exposure and detection threshold")

    # candidate lines over the whole search range
    wide = [nominal.with_changes(tilt_deg=nominal.tilt_deg + s * tilt_range_deg,
                                 focal_length_mm=nominal.focal_length_mm * (1 + r * focal_range_fraction))
            for s in (-1, 1) for r in (-1, 1)]
    lo = min(m.wavelength(-0.5 - 20) for m in wide)
    hi = max(m.wavelength(nx - 0.5 + 20) for m in wide)
    cand = line_list.in_range(lo, hi)
    if len(cand) < min_lines:
        raise WavelengthSolutionError(
            f"only {len(cand)} listed lines fall within {lo:.0f}-{hi:.0f} A for {setup}; "
            "check LAMPS, instrument.lamps and the grating tilt")
    center_prior_px = float(center_prior_mm) / nominal.pixel_mm
    fwhm_px = float(lines.info.get("fwhm_median_px", np.nanmedian(lines.fwhm_px)))
    disp = abs(float(nominal.dispersion(nominal.center_px)))
    cand = merge_unresolved(cand, max_separation_angstrom=merge_fwhm * fwhm_px * disp)
    iso = isolated_lines(cand.wave_air_angstrom, cand.species, cand.relative_intensity,
                         min_separation_angstrom=isolation_fwhm * fwhm_px * disp,
                         faint_ratio=faint_neighbour_ratio)

    # 1. vote for tilt and focal length with the strongest usable detections
    idx_search = np.flatnonzero(usable)
    idx_search = idx_search[np.argsort(-lines.snr[idx_search])][:n_search_lines]
    candidates = search_grating_parameters(
        lines.x_px[idx_search], cand.wave_air_angstrom, nominal, nx,
        tilt_range_deg=tilt_range_deg, focal_range_fraction=focal_range_fraction,
        tolerance_px=search_tolerance_px)
    if not candidates:
        raise WavelengthSolutionError(f"no tilt within +-{tilt_range_deg} deg and focal length "
                                      f"within +-{100 * focal_range_fraction:.1f} % explains the "
                                      f"detected lines for {setup}")

    x_all = lines.x_px
    sig_px = np.sqrt(np.where(np.isfinite(lines.x_err_px), lines.x_err_px, 1.0) ** 2
                     + centroid_floor_px ** 2)
    det_clean = np.flatnonzero(clean)
    cand_use = np.flatnonzero(iso)

    def refine(model):
        """Match, fit the physical model, rematch; returns (model, errs, d_idx, p_idx)."""
        errs = {}
        for tol in (match_tolerance_px, 0.75 * match_tolerance_px, 0.5 * match_tolerance_px):
            d_i, p_i = match_lines(x_all[det_clean], model.pixel(cand.wave_air_angstrom[cand_use]),
                                   tolerance_px=tol)
            if d_i.size < 4:
                return model, errs, d_i, p_i
            d_sel, p_sel = det_clean[d_i], cand_use[p_i]
            model, _, errs, _ = fit_grating_parameters(
                x_all[d_sel], sig_px[d_sel], cand.wave_air_angstrom[p_sel], model,
                center_prior_px=center_prior_px, center_nominal_px=nominal.center_px,
                fit_center=d_i.size >= 6)
        d_i, p_i = match_lines(x_all[det_clean], model.pixel(cand.wave_air_angstrom[cand_use]),
                               tolerance_px=0.5 * match_tolerance_px)
        return model, errs, d_i, p_i

    refined = []
    for c in candidates:
        start = nominal.with_changes(tilt_deg=c["tilt_deg"], focal_length_mm=c["focal_length_mm"])
        model, errs, d_i, p_i = refine(start)
        resid = x_all[det_clean[d_i]] - model.pixel(cand.wave_air_angstrom[cand_use[p_i]])
        refined.append({"model": model, "errors": errs, "n": int(d_i.size), "vote": c["score"],
                        "rms_px": float(np.sqrt(np.mean(resid ** 2))) if d_i.size else math.inf,
                        "d": d_i, "p": p_i})
    refined.sort(key=lambda r: (-r["n"], r["rms_px"]))
    best = refined[0]
    # ambiguity: another solution that lands lines elsewhere but matches nearly as many
    for other in refined[1:]:
        shift = abs(float(other["model"].wavelength(nx / 2) - best["model"].wavelength(nx / 2)))
        if shift > 2 * disp and other["n"] >= ambiguity_ratio * best["n"] and best["n"] < n_clean:
            raise WavelengthSolutionError(
                f"ambiguous identification for {setup}: {best['n']} lines match at tilt "
                f"{best['model'].tilt_deg:.3f} deg but {other['n']} at "
                f"{other['model'].tilt_deg:.3f} deg (centre differs by {shift:.1f} A)")
    model = best["model"]

    # 2. model + correction polynomial, fitted together with iterative sigma clipping of the
    #    normalised residuals, rematching with the refined solution
    domain = (0.0, float(nx - 1))
    coeffs = np.zeros(max(correction_degree, 0) + 1)
    d_sel = p_sel = np.zeros(0, int)
    keep = np.zeros(0, bool)
    errs = best["errors"]
    tol = match_tolerance_px
    clip = partial(sigma_clip, sigma=clip_sigma, maxiters=1, cenfunc="median", stdfunc="mad_std")
    for _ in range(3):
        xp = _solution_pixels(model, coeffs, domain, cand.wave_air_angstrom[cand_use])
        d_i, p_i = match_lines(x_all[det_clean], xp, tolerance_px=tol)
        d_sel, p_sel = det_clean[d_i], cand_use[p_i]
        if d_sel.size < min_lines:
            break
        wave = cand.wave_air_angstrom[p_sel]
        # fewer lines than terms: drop the highest correction terms
        n_room = max(0, d_sel.size - 3 - 4)
        terms = tuple(range(correction_min_degree, correction_degree + 1))[:n_room]
        keep = np.ones(d_sel.size, bool)
        for _k in range(max(1, int(clip_iterations))):
            model_k, coeffs_k, errs_k, _ = fit_grating_parameters(
                x_all[d_sel], sig_px[d_sel], wave, model, correction_terms=terms,
                domain_px=domain, center_prior_px=center_prior_px,
                center_nominal_px=nominal.center_px, keep=keep)
            lam = model_k.wavelength(x_all[d_sel]) + cheb.chebval(_to_unit(x_all[d_sel], domain),
                                                                   coeffs_k)
            norm = (wave - lam) / (np.abs(model_k.dispersion(x_all[d_sel])) * sig_px[d_sel])
            new_keep = ~np.ma.getmaskarray(clip(np.ma.masked_array(norm, mask=~keep)))
            if new_keep.sum() < min_lines:
                new_keep = keep
            done = np.array_equal(new_keep, keep)
            keep = new_keep
            if done:
                break
        model, errs = model_k, errs_k
        coeffs = np.zeros(max(correction_degree, 0) + 1)
        coeffs[:coeffs_k.size] = coeffs_k[:coeffs.size]
        r_px = (wave - model.wavelength(x_all[d_sel])
                - cheb.chebval(_to_unit(x_all[d_sel], domain), coeffs)) / np.abs(
            model.dispersion(x_all[d_sel]))
        rms = float(np.sqrt(np.mean(r_px[keep] ** 2))) if keep.any() else math.inf
        tol = min(match_tolerance_px, max(final_tolerance_px, 5 * rms))

    n_used = int(keep.sum())
    if n_used < min_lines:
        raise WavelengthSolutionError(
            f"only {n_used} arc lines identified and kept (need >= {min_lines}) for {setup}; "
            f"best vote: tilt {best['model'].tilt_deg:.3f} deg with {best['n']} matches")
    if n_used < min_matched_fraction * n_clean:
        raise WavelengthSolutionError(
            f"only {n_used} of {n_clean} clean detected lines identified (< "
            f"{100 * min_matched_fraction:.0f} %) for {setup}; the lamps or the optics differ "
            "from the config")
    wave = cand.wave_air_angstrom[p_sel]
    x_m = x_all[d_sel]
    sol_wave = model.wavelength(x_m) + cheb.chebval(_to_unit(x_m, domain), coeffs)
    res_a = wave - sol_wave
    disp_i = np.abs(model.dispersion(x_m))
    res_px = res_a / disp_i
    rms_a = float(np.sqrt(np.mean(res_a[keep] ** 2)))
    rms_px = float(np.sqrt(np.mean(res_px[keep] ** 2)))
    rms_v = float(SPEED_OF_LIGHT_KM_S * np.sqrt(np.mean((res_a[keep] / wave[keep]) ** 2)))
    if rms_px > max_rms_px:
        raise WavelengthSolutionError(
            f"1-D fit rms {rms_px:.3f} px ({rms_a:.3f} A) exceeds {max_rms_px} px with "
            f"{n_used} lines for {setup}")
    for name, value, limit in (
            ("tilt", model.tilt_deg - nominal.tilt_deg, tilt_range_deg * 1.2),
            ("focal length", model.focal_length_mm / nominal.focal_length_mm - 1,
             focal_range_fraction * 1.2)):
        if abs(value) > limit:
            raise WavelengthSolutionError(
                f"fitted {name} is {value:+.4g} from nominal, beyond the search range, for {setup}")
    n_rej = int((~keep).sum())
    if n_rej > keep.size / 3:
        warnings.warn(f"{n_rej} of {keep.size} matched arc lines rejected by clipping",
                      ArcQualityWarning, stacklevel=2)
    span = (float(x_m[keep].min()), float(x_m[keep].max()))
    coverage = (span[1] - span[0]) / max(nx - 1, 1)
    if coverage < warn_line_coverage_fraction:
        warnings.warn(f"the {n_used} arc lines used span only pixels {span[0]:.0f}-{span[1]:.0f} "
                      f"({100 * coverage:.0f} % of the detector); beyond them the wavelengths are "
                      "extrapolated from the grating model", ArcQualityWarning, stacklevel=2)
    order = np.argsort(x_m)
    matched = {
        "x_px": x_m[order], "x_err_px": lines.x_err_px[d_sel][order],
        "wave_angstrom": wave[order], "species": cand.species[p_sel][order],
        "source": cand.source[p_sel][order], "used": keep[order],
        "residual_angstrom": res_a[order], "residual_px": res_px[order],
        "detected_index": d_sel[order], "snr": lines.snr[d_sel][order],
        "fwhm_px": lines.fwhm_px[d_sel][order],
    }
    info = {
        "n_detected": int(len(lines)), "n_clean": n_clean, "n_listed": int(len(cand)),
        "n_isolated_listed": int(iso.sum()), "search": candidates,
        "vote_best": best["vote"], "refined_matches": [r["n"] for r in refined],
        "fwhm_px": fwhm_px, "final_tolerance_px": float(tol),
        "unmatched_clean_detected": int(n_clean - d_sel.size),
        "line_span_px": span, "line_coverage_fraction": coverage,
    }
    return WavelengthSolution1D(model, nominal, coeffs, domain, nx, float(reference_row),
                                matched, rms_a, rms_px, rms_v, n_used, n_rej, errs, info)


# --------------------------------------------------------------------------------------
# 2-D: tracing and line tilt
# --------------------------------------------------------------------------------------

def _xcorr_shift(a, b, max_shift_px):
    """Shift (px) of each row of ``a`` relative to the same row of ``b`` (cross-correlation
    peak with a parabolic refinement), searched within ``+-max_shift_px``."""
    nb, nx = a.shape
    n = 1 << int(math.ceil(math.log2(2 * nx)))
    fa = np.fft.rfft(a, n, axis=1)
    fb = np.fft.rfft(b, n, axis=1)
    cc = np.fft.irfft(fa * np.conj(fb), n, axis=1)
    lags = np.r_[np.arange(0, n // 2), np.arange(-n // 2, 0)]
    sel = np.flatnonzero(np.abs(lags) <= int(math.ceil(max_shift_px)) + 1)
    sel = sel[np.argsort(lags[sel])]
    sub = cc[:, sel]
    k = np.clip(np.argmax(sub, axis=1), 1, sel.size - 2)
    rows = np.arange(nb)
    y0, y1, y2 = sub[rows, k - 1], sub[rows, k], sub[rows, k + 1]
    den = y0 - 2 * y1 + y2
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.where(den < 0, 0.5 * (y0 - y2) / den, 0.0)
    return lags[sel][k] + np.clip(frac, -0.5, 0.5)


def _band_shifts(spectra, ref_index, max_step_px=2.0, min_signal_fraction=0.05):
    """Shift (px) of each band relative to band ``ref_index``.

    Each band is cross-correlated with its neighbour towards the reference band
    and the steps are summed outwards, so lines tilted or curved by many pixels
    over the slit are followed step by step. Bands with less than
    ``min_signal_fraction`` of the reference band's line signal (slit ends) keep
    the shift of their neighbour.
    """
    nb, nx = spectra.shape
    s = spectra - np.median(spectra, axis=1, keepdims=True)
    s = np.where(np.isfinite(s), np.clip(s, 0, None), 0.0)
    signal = s.sum(axis=1)
    weak = signal < min_signal_fraction * max(signal[ref_index], 1e-30)
    toward = np.where(np.arange(nb) > ref_index, np.arange(nb) - 1, np.arange(nb) + 1)
    toward[ref_index] = ref_index
    steps = _xcorr_shift(s, s[toward], max_step_px)
    steps = np.where(weak | (np.abs(steps) > max_step_px), 0.0, steps)
    steps[ref_index] = 0.0
    shifts = np.zeros(nb)
    for b in range(ref_index + 1, nb):
        shifts[b] = shifts[b - 1] + steps[b]
    for b in range(ref_index - 1, -1, -1):
        shifts[b] = shifts[b + 1] + steps[b]
    return shifts


def trace_lines(data, variance, mask, x_ref_px, wave_angstrom, *, reference_row,
                sigma_px, band_rows=8, min_snr=10.0, max_offset_px=1.0, half_width_px=None,
                guess_px=None):
    """Measure identified lines in bands of rows across the slit.

    Without ``guess_px`` the shift of every band relative to the band holding
    ``reference_row`` is found by cross-correlating neighbouring bands step by
    step; each line is then fitted (pixel-integrated Gaussian,
    :func:`pipeline.wavelength.arclines.measure_lines`) near its predicted position, all
    bands and lines in one vectorised call.

    Parameters
    ----------
    data, variance, mask : ndarray, shape (ny, nx)
    x_ref_px, wave_angstrom : ndarray, shape (n_lines,)
        Lines on the reference row.
    reference_row : float
    sigma_px : float
        Gaussian sigma guess.
    band_rows : int
        Rows per band.
    min_snr : float
        Fewest flux/error for a point to count.
    max_offset_px : float
        Largest distance between a fitted centre and its predicted position.
    half_width_px : int, optional
        Fit window half width (default from ``sigma_px``).
    guess_px : ndarray, shape (n_bands, n_lines), optional
        Predicted positions (e.g. from a first 2-D fit); replaces the band shifts.

    Returns
    -------
    LineTraces
    """
    data = np.asarray(data, dtype=float)
    ny, nx = data.shape
    br = max(1, int(band_rows))
    nb = ny // br
    if nb < 2:
        raise ValueError(f"`band_rows` = {band_rows} leaves fewer than 2 bands in {ny} rows")
    rows = slice(0, nb * br)
    d = data[rows].reshape(nb, br, nx)
    v = np.asarray(variance, dtype=float)[rows].reshape(nb, br, nx)
    mk = np.asarray(mask)[rows].reshape(nb, br, nx)
    flux, var, bmask = sum_rows(d, v, mk)
    y_band = np.arange(nb) * br + 0.5 * (br - 1)
    ref_band = int(np.clip(round((reference_row - 0.5 * (br - 1)) / br), 0, nb - 1))
    x_ref = np.asarray(x_ref_px, dtype=float)
    if guess_px is None:
        shifts = _band_shifts(flux, ref_band)
        guess = x_ref[None, :] + shifts[:, None]
    else:
        guess = np.asarray(guess_px, dtype=float)
        if guess.shape != (nb, x_ref.size):
            raise ValueError(f"`guess_px` must have shape {(nb, x_ref.size)}, got {guess.shape}")
        shifts = np.nanmedian(guess - x_ref[None, :], axis=1)
    n_lines = x_ref.size
    # one long spectrum: bands end to end, separated by zero-weight gaps
    hw = int(half_width_px) if half_width_px is not None else int(math.ceil(2.5 * sigma_px) + 1)
    gap = hw + 2
    stride = nx + gap
    long_flux = np.zeros(nb * stride)
    long_var = np.full(nb * stride, np.inf)
    long_mask = np.zeros(nb * stride, dtype=maskbits.MASK_DTYPE)
    for b in range(nb):
        long_flux[b * stride:b * stride + nx] = flux[b]
        long_var[b * stride:b * stride + nx] = var[b]
        long_mask[b * stride:b * stride + nx] = bmask[b]
    offsets = (np.arange(nb) * stride)[:, None]
    fit = measure_lines(long_flux, long_var, (guess + offsets).ravel(), sigma_guess_px=sigma_px,
                        mask=long_mask, half_width_px=hw, max_shift_px=max_offset_px)
    x = fit["x_px"].reshape(nb, n_lines) - offsets
    x_err = fit["x_err_px"].reshape(nb, n_lines)
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = (fit["flux_e"] / fit["flux_err_e"]).reshape(nb, n_lines)
    inside = np.isfinite(guess) & (guess > hw) & (guess < nx - 1 - hw)
    guess = np.where(np.isfinite(guess), guess, x_ref[None, :])
    ok = (fit["ok"].reshape(nb, n_lines) & (snr >= min_snr) & inside
          & ~fit["saturated"].reshape(nb, n_lines) & ~fit["masked"].reshape(nb, n_lines))
    x = np.where(ok, x, np.nan)
    x_err = np.where(ok, x_err, np.nan)
    return LineTraces(np.asarray(wave_angstrom, dtype=float), x_ref, y_band, x, x_err, ok,
                      {"band_rows": br, "n_bands": nb, "band_shift_px": shifts,
                       "reference_band": ref_band})


def fit_line_tilt(traces, solution_1d, shape, *, degree_x=2, degree_y=2, clip_sigma=4.0,
                  clip_iterations=5, centroid_floor_px=0.01, min_points=20):
    """Fit ``Q(x, y)`` so that ``x + Q(x, y)`` is the reference-row position of each line.

    Each line gets its own free offset (absorbing the difference between its
    reference-row measurement and the traced bands), so only the shape of the
    lines along the slit enters ``Q``. Weighted linear least squares with
    iterative sigma clipping (astropy ``sigma_clip``) of the normalised residuals.

    Parameters
    ----------
    traces : LineTraces
    solution_1d : WavelengthSolution1D
    shape : (int, int)
        ``(ny, nx)``.
    degree_x, degree_y : int
        Degrees of ``Q`` in x (>= 0) and y (>= 1).

    Returns
    -------
    WavelengthSolution2D

    Raises
    ------
    WavelengthSolutionError
        When fewer than ``min_points`` points or too few lines were traced.
    """
    ny, nx = shape
    if degree_y < 1 or degree_x < 0:
        raise ValueError(f"`degree_y` must be >= 1 and `degree_x` >= 0, got {degree_y}, {degree_x}")
    nb, nl = traces.x_px.shape
    yy = np.broadcast_to(traces.y_px[:, None], (nb, nl))
    ok = traces.ok & np.isfinite(traces.x_px)
    lines_ok = ok.sum(axis=0) >= 3
    ok &= lines_ok[None, :]
    n_terms = (degree_x + 1) * degree_y
    if ok.sum() < max(min_points, n_terms + lines_ok.sum() + 3) or lines_ok.sum() < degree_x + 2:
        raise WavelengthSolutionError(
            f"only {int(ok.sum())} points on {int(lines_ok.sum())} lines traced along the slit; "
            "too few to fit the line tilt (check trace_band_rows and trace_min_snr)")
    x_ref0 = 0.5 * (nx - 1)
    x_scale = 0.5 * nx
    y_ref = solution_1d.reference_row
    y_scale = 0.5 * ny
    line_idx = np.flatnonzero(lines_ok)
    col_of_line = -np.ones(nl, dtype=int)
    col_of_line[line_idx] = np.arange(line_idx.size)
    b_i, l_i = np.nonzero(ok)
    xm = traces.x_px[b_i, l_i]
    ym = yy[b_i, l_i]
    sig = np.sqrt(traces.x_err_px[b_i, l_i] ** 2 + centroid_floor_px ** 2)
    target = traces.x_ref_px[l_i] - xm                     # = Q(x, y) + offset of the line
    xn = (xm - x_ref0) / x_scale
    yn = (ym - y_ref) / y_scale
    design = np.column_stack([xn ** i * yn ** j for i in range(degree_x + 1)
                              for j in range(1, degree_y + 1)])
    group = col_of_line[l_i]
    n_groups = line_idx.size
    wgt = 1.0 / sig ** 2
    keep = np.ones(xm.size, dtype=bool)
    clip = partial(sigma_clip, sigma=clip_sigma, maxiters=1, cenfunc="median", stdfunc="mad_std")

    def group_mean(values, wk):
        # weighted mean of each line's kept points, broadcast back to the points
        num = np.zeros((n_groups,) + values.shape[1:])
        np.add.at(num, group, values * wk.reshape((-1,) + (1,) * (values.ndim - 1)))
        den = np.bincount(group, weights=wk, minlength=n_groups)
        den = np.where(den > 0, den, 1.0)
        return (num / den.reshape((-1,) + (1,) * (values.ndim - 1)))[group]

    for _ in range(max(1, int(clip_iterations))):
        wk = np.where(keep, wgt, 0.0)
        # the line offsets are eliminated by removing each line's weighted mean
        a = design - group_mean(design, wk)
        t = target - group_mean(target, wk)
        sw = np.sqrt(wk)
        params, *_ = np.linalg.lstsq(a * sw[:, None], t * sw, rcond=None)
        offsets = group_mean(target - design @ params, wk)
        norm = (target - design @ params - offsets) / sig
        new_keep = ~np.ma.getmaskarray(clip(np.ma.masked_array(norm, mask=~keep)))
        if np.array_equal(new_keep, keep):
            break
        keep = new_keep
    q = params.reshape(degree_x + 1, degree_y)
    resid_pts = target - design @ params - offsets          # px, along x
    residual = np.full((nb, nl), np.nan)
    residual[b_i, l_i] = resid_pts
    used = np.zeros((nb, nl), dtype=bool)
    used[b_i, l_i] = keep
    rms_px = float(np.sqrt(np.mean(resid_pts[keep] ** 2)))
    disp = np.abs(solution_1d.dispersion(xm[keep]))
    rms_a = float(np.sqrt(np.mean((resid_pts[keep] * disp) ** 2)))
    info = {"n_points": int(keep.sum()), "n_rejected": int((~keep).sum()),
            "n_lines": int(line_idx.size), "degree_x": int(degree_x), "degree_y": int(degree_y),
            "line_offsets_px": np.array([offsets[group == g][0] if np.any(group == g) else 0.0
                                         for g in range(n_groups)])}
    return WavelengthSolution2D(solution_1d, q, x_ref0, x_scale, float(y_ref), y_scale,
                                (int(ny), int(nx)), traces, used, residual, rms_px, rms_a, info)


def solve_wavelength(data, variance, mask, lines, line_list, nominal, *, reference_row,
                     trace_band_rows=8, trace_min_snr=10.0, tilt_degree_x=2, tilt_degree_y=2,
                     tilt_clip_sigma=4.0, **options_1d):
    """Full solution of one arc: identification, 1-D fit, tracing and line tilt.

    Parameters
    ----------
    data, variance, mask : ndarray, shape (ny, nx)
        Calibrated arc frame (canonical orientation).
    lines : ArcLines
        Lines measured on ``reference_row``.
    line_list : LineList
    nominal : GratingModel
    reference_row : float
    trace_band_rows, trace_min_snr : int, float
        See :func:`trace_lines`.
    tilt_degree_x, tilt_degree_y, tilt_clip_sigma
        See :func:`fit_line_tilt`.
    **options_1d
        Passed to :func:`solve_1d`.

    Returns
    -------
    WavelengthSolution2D
    """
    data = np.asarray(data)
    if data.ndim != 2:
        raise ValueError(f"`data` must be 2-D (ny, nx), got shape {data.shape}")
    ny, nx = data.shape
    sol1 = solve_1d(lines, line_list, nominal, nx, reference_row=reference_row, **options_1d)
    used = sol1.lines["used"]
    sigma = float(np.nanmedian(sol1.lines["fwhm_px"][used])) / (2 * math.sqrt(2 * math.log(2)))
    x_ref, waves = sol1.lines["x_px"][used], sol1.lines["wave_angstrom"][used]
    fit_options = dict(degree_x=tilt_degree_x, degree_y=tilt_degree_y, clip_sigma=tilt_clip_sigma,
                       centroid_floor_px=options_1d.get("centroid_floor_px", 0.01))
    traces = trace_lines(data, variance, mask, x_ref, waves, reference_row=reference_row,
                         sigma_px=sigma, band_rows=trace_band_rows, min_snr=trace_min_snr)
    sol2 = fit_line_tilt(traces, sol1, (ny, nx), **fit_options)
    # second pass: measure every band again where the first 2-D fit puts each line
    guess = predicted_positions(sol2)
    traces = trace_lines(data, variance, mask, x_ref, waves, reference_row=reference_row,
                         sigma_px=sigma, band_rows=trace_band_rows, min_snr=trace_min_snr,
                         max_offset_px=0.75, guess_px=guess)
    return fit_line_tilt(traces, sol1, (ny, nx), **fit_options)


def predicted_positions(solution):
    """Where each traced line lies in each band according to a 2-D solution.

    Solves ``x + Q(x, y) = x_ref + offset`` by fixed-point iteration.

    Returns
    -------
    ndarray, shape (n_bands, n_lines), px
        ``nan`` for lines the solution did not fit.
    """
    tr = solution.traces
    offsets = np.full(tr.x_ref_px.size, np.nan)
    fitted = tr.ok.sum(axis=0) >= 3
    offsets[np.flatnonzero(fitted)] = solution.info["line_offsets_px"][:int(fitted.sum())]
    target = (tr.x_ref_px - offsets)[None, :]
    y = tr.y_px[:, None]
    x = np.broadcast_to(target, tr.x_px.shape).copy()
    for _ in range(6):
        x = target - solution.shift(x, y)
    return x


# --------------------------------------------------------------------------------------
# products: FITS solution, QA table, reader
# --------------------------------------------------------------------------------------

#: Keywords of the calibrated arc copied into the solution header.
_COPIED_KEYWORDS = ("OBJECT", "DATE-OBS", "MJD-OBS", "EXPTIME", "INSTRUME", "TELESCOP",
                    "GRATING", "GRTILT", "SLITWID", "FILTER", "LAMPS", "CCDSUM", "BINSPEC",
                    "BINSPAT", "ORIENT_T", "ORIENT_X", "ORIENT_Y", "TRIM_X0", "TRIM_Y0")


def solution_header(solution, *, arc_header=None, setup="", arc_name=""):
    """FITS header of the solution map: fitted model as WCS, correction, tilt polynomial.

    Parameters
    ----------
    solution : WavelengthSolution2D
    arc_header : astropy.io.fits.Header, optional
        Header of the calibrated arc; the keywords in ``_COPIED_KEYWORDS`` are kept.
    setup : str
    arc_name : str

    Returns
    -------
    astropy.io.fits.Header
        Axis 1 is the dispersion: ``CTYPE1 = 'AWAV-GRA'`` evaluates the fitted
        grating model on row ``WSYREF`` (the Chebyshev correction ``WCCn`` is to be
        added, see :data:`HEADER_KEYWORDS`); axis 2 is the slit pixel (linear).
    """
    from astropy.io import fits

    s1 = solution.solution_1d
    m, m0, e = s1.model, s1.nominal, s1.parameter_errors
    h = fits.Header()
    if arc_header is not None:
        for key in _COPIED_KEYWORDS:
            if key in arc_header:
                h[key] = (arc_header[key], arc_header.comments[key])
    h["SETUP"] = (str(setup), HEADER_KEYWORDS["SETUP"])
    h["ARCFRAME"] = (str(arc_name), HEADER_KEYWORDS["ARCFRAME"])
    h["BUNIT"] = ("Angstrom", "air wavelength at each pixel centre")
    h["WAVEKIND"] = ("air", "values are air wavelengths (standard air)")
    h["WCSAXES"] = 2
    for key, value, comment in gr.grating_wcs_cards(m, axis=1):
        h[key] = (value, comment)
    h["CTYPE2"] = ("LINEAR", "slit pixel")
    h["CRPIX2"] = (s1.reference_row + 1.0, "reference row (1-based)")
    h["CRVAL2"] = (s1.reference_row, "[px] 0-based row at CRPIX2")
    h["CDELT2"] = (1.0, "[px]")
    rows = [
        ("WSTILT", m.tilt_deg), ("WSTILTE", e.get("tilt_deg", math.nan)), ("WSTILT0", m0.tilt_deg),
        ("WSFOCAL", m.focal_length_mm), ("WSFOCALE", e.get("focal_length_mm", math.nan)),
        ("WSFOCAL0", m0.focal_length_mm), ("WSXCEN", m.center_px),
        ("WSXCENE", e.get("center_px", math.nan)), ("WSXCEN0", m0.center_px),
        ("WSBIN", m.binning), ("WSRMSA", s1.rms_angstrom), ("WSRMSP", s1.rms_px),
        ("WSRMSV", s1.rms_km_s), ("WSNLINE", s1.n_used), ("WSNREJ", s1.n_rejected),
        ("WSNDET", s1.info.get("n_detected", 0)), ("WSYREF", s1.reference_row),
        ("WCPOLY", "chebyshev"), ("WCDEG", s1.correction_coeffs.size - 1),
        ("WCDOM0", s1.domain_px[0]), ("WCDOM1", s1.domain_px[1]),
    ]
    for key, value in rows:
        value = value if not isinstance(value, float) or math.isfinite(value) else -1.0
        h[key] = (value, HEADER_KEYWORDS[key])
    for k, c in enumerate(s1.correction_coeffs):
        h[f"WCC{k}"] = (float(c), f"[Angstrom] correction coefficient {k}")
    h["WQXDEG"] = (solution.q_coeffs.shape[0] - 1, HEADER_KEYWORDS["WQXDEG"])
    h["WQYDEG"] = (solution.q_coeffs.shape[1], HEADER_KEYWORDS["WQYDEG"])
    h["WQXREF"] = (solution.x_ref, HEADER_KEYWORDS["WQXREF"])
    h["WQXSCL"] = (solution.x_scale, HEADER_KEYWORDS["WQXSCL"])
    h["WQYSCL"] = (solution.y_scale, HEADER_KEYWORDS["WQYSCL"])
    for i in range(solution.q_coeffs.shape[0]):
        for j in range(1, solution.q_coeffs.shape[1] + 1):
            h[f"WQ{i}{j}"] = (float(solution.q_coeffs[i, j - 1]), f"[px] Q coefficient x^{i} y^{j}")
    h["WS2DRMSP"] = (solution.rms_px, HEADER_KEYWORDS["WS2DRMSP"])
    h["WS2DRMSA"] = (solution.rms_angstrom, HEADER_KEYWORDS["WS2DRMSA"])
    h["WS2DNPT"] = (solution.info["n_points"], HEADER_KEYWORDS["WS2DNPT"])
    h["WS2DNLN"] = (solution.info["n_lines"], HEADER_KEYWORDS["WS2DNLN"])
    h.add_comment("lambda(x, y) = lambda_grating(x + Q) + sum_n WCCn T_n(u), u = (2 (x + Q) - "
                  "WCDOM0 - WCDOM1) / (WCDOM1 - WCDOM0); lambda_grating is the AWAV-GRA axis")
    h.add_comment("Q(x, y) = sum WQij ((x - WQXREF) / WQXSCL)^i ((y - WSYREF) / WQYSCL)^j, j >= 1")
    return h


def _lines_hdu(solution):
    from astropy.io import fits
    from astropy.table import Table

    s1 = solution.solution_1d
    t = Table()
    for key in ("x_px", "x_err_px", "wave_angstrom", "residual_angstrom", "residual_px", "snr",
                "fwhm_px"):
        t[key] = np.asarray(s1.lines[key], dtype=float)
    t["species"] = np.asarray(s1.lines["species"], dtype=str)
    t["source"] = np.asarray(s1.lines["source"], dtype=str)
    t["used"] = np.asarray(s1.lines["used"], dtype=bool)
    hdu = fits.table_to_hdu(t)
    hdu.name = "LINES"
    return hdu


def _trace_hdu(solution):
    from astropy.io import fits
    from astropy.table import Table

    tr = solution.traces
    nb, nl = tr.x_px.shape
    b, l = np.nonzero(np.isfinite(tr.x_px))
    t = Table()
    t["y_px"] = tr.y_px[b]
    t["wave_angstrom"] = tr.wave_angstrom[l]
    t["x_px"] = tr.x_px[b, l]
    t["x_err_px"] = tr.x_err_px[b, l]
    t["residual_px"] = solution.residual_px[b, l]
    t["used"] = solution.used[b, l]
    hdu = fits.table_to_hdu(t)
    hdu.name = "TRACE"
    return hdu


def qa_metrics(solution, *, setup="", arc_name="", filter_name="", overlap=None,
               elapsed_s=math.nan):
    """Every scalar QA metric of a solution, as a flat dict (units in the names)."""
    s1 = solution.solution_1d
    m, m0, e = s1.model, s1.nominal, s1.parameter_errors
    ny, nx = solution.shape
    xc = (nx - 1) / 2
    used = s1.lines["used"]
    fwhm = float(np.nanmedian(s1.lines["fwhm_px"][used])) if used.any() else math.nan
    disp_c = float(abs(s1.dispersion(xc)))
    lam_c = float(s1.wavelength(xc))
    # line tilt and curvature on the detector centre column, from Q
    y_ref = solution.y_ref
    dq_dy = float(solution.shift(xc, y_ref + 0.5) - solution.shift(xc, y_ref - 0.5))
    edge = float(solution.shift(xc, 0.0)), float(solution.shift(xc, ny - 1.0))
    lam_edges = solution.wavelength(np.array([0.0, nx - 1.0]), np.array([y_ref, y_ref]))
    metrics = {
        "arc_frame": arc_name, "setup": setup, "filter": filter_name,
        "nx_px": nx, "ny_px": ny, "reference_row_px": s1.reference_row,
        "n_detected": s1.info.get("n_detected", 0), "n_clean_detected": s1.info.get("n_clean", 0),
        "n_listed_in_range": s1.info.get("n_listed", 0),
        "n_listed_isolated": s1.info.get("n_isolated_listed", 0),
        "n_matched": int(used.size), "n_used": s1.n_used, "n_rejected": s1.n_rejected,
        "rms_angstrom": s1.rms_angstrom, "rms_px": s1.rms_px, "rms_km_s": s1.rms_km_s,
        "tilt_nominal_deg": m0.tilt_deg, "tilt_fitted_deg": m.tilt_deg,
        "tilt_error_deg": e.get("tilt_deg", math.nan),
        "focal_length_nominal_mm": m0.focal_length_mm, "focal_length_fitted_mm": m.focal_length_mm,
        "focal_length_error_mm": e.get("focal_length_mm", math.nan),
        "camera_axis_nominal_px": m0.center_px, "camera_axis_fitted_px": m.center_px,
        "camera_axis_error_px": e.get("center_px", math.nan),
        "detector_offset_px": m.center_px - m0.center_px,
        "line_first_px": s1.info.get("line_span_px", (math.nan, math.nan))[0],
        "line_last_px": s1.info.get("line_span_px", (math.nan, math.nan))[1],
        "line_coverage_fraction": s1.info.get("line_coverage_fraction", math.nan),
        "correction_degree": int(s1.correction_coeffs.size - 1),
        "correction_max_abs_angstrom": float(np.max(np.abs(s1.correction(np.linspace(0, nx - 1, 64))))),
        "wavelength_first_px_angstrom": float(lam_edges[0]),
        "wavelength_last_px_angstrom": float(lam_edges[1]),
        "central_wavelength_angstrom": lam_c,
        "dispersion_center_angstrom_per_px": disp_c,
        "dispersion_center_nominal_angstrom_per_px": float(abs(m0.dispersion(xc))),
        "fwhm_median_px": fwhm,
        "resolving_power_measured": lam_c / (fwhm * disp_c) if fwhm > 0 else math.nan,
        "rms_2d_px": solution.rms_px, "rms_2d_angstrom": solution.rms_angstrom,
        "n_points_2d": solution.info["n_points"], "n_rejected_2d": solution.info["n_rejected"],
        "n_lines_traced": solution.info["n_lines"],
        "line_tilt_center_px_per_row": dq_dy,
        "line_shift_first_row_px": edge[0], "line_shift_last_row_px": edge[1],
        "order_overlap_unblocked": bool(overlap) if overlap is not None else False,
        "solve_time_s": elapsed_s,
    }
    return metrics


def qa_table(solution, metrics):
    """QA table: one row per matched line; the metrics in the table's metadata."""
    from astropy.table import Table

    s1 = solution.solution_1d
    t = Table()
    t["x_px"] = np.asarray(s1.lines["x_px"], dtype=float)
    t["x_err_px"] = np.asarray(s1.lines["x_err_px"], dtype=float)
    t["wave_angstrom"] = np.asarray(s1.lines["wave_angstrom"], dtype=float)
    t["species"] = np.asarray(s1.lines["species"], dtype=str)
    t["source"] = np.asarray(s1.lines["source"], dtype=str)
    t["used"] = np.asarray(s1.lines["used"], dtype=bool)
    t["residual_angstrom"] = np.asarray(s1.lines["residual_angstrom"], dtype=float)
    t["residual_px"] = np.asarray(s1.lines["residual_px"], dtype=float)
    t["residual_km_s"] = SPEED_OF_LIGHT_KM_S * t["residual_angstrom"] / t["wave_angstrom"]
    t["snr"] = np.asarray(s1.lines["snr"], dtype=float)
    t.meta.update(metrics)
    return t


@dataclass(frozen=True)
class WavelengthMap:
    """A wavelength solution read back from its FITS file.

    Attributes
    ----------
    wave_angstrom : ndarray, shape (ny, nx), float64, Angstrom (air)
    header : astropy.io.fits.Header
    """

    wave_angstrom: np.ndarray
    header: object

    @property
    def shape(self):
        return self.wave_angstrom.shape


def load_wavelength_map(path):
    """Read the dense wavelength map written by :func:`solve_wavelength_file`.

    Returns
    -------
    WavelengthMap
        ``.wave_angstrom`` (ny, nx) float64 and the header (fitted tilt ``WSTILT``,
        rms ``WSRMSA``/``WSRMSP``/``WSRMSV``, ``SETUP``, WCS, ...).

    Raises
    ------
    InputFileError
        When the file cannot be read, the PRIMARY HDU is not a 2-D map in Angstrom,
        or the values are not increasing along axis 1.
    """
    from astropy.io import fits

    try:
        with fits.open(path, memmap=False) as hdul:
            header = hdul[0].header.copy()
            data = hdul[0].data
            wave = None if data is None else np.asarray(data, dtype=np.float64)
    except OSError as exc:
        raise InputFileError(path, f"cannot be read as FITS ({exc})") from None
    if wave is None or wave.ndim != 2:
        raise InputFileError(path, "PRIMARY HDU must hold the 2-D wavelength map lambda(y, x); "
                             f"found {None if wave is None else wave.shape}")
    if str(header.get("BUNIT", "")).strip().lower() not in ("angstrom", "a"):
        raise InputFileError(path, f"keyword BUNIT = {header.get('BUNIT')!r}; expected 'Angstrom' "
                             "(a map written by pipeline.wavelength.solve.solve_wavelength_file)")
    row = wave[wave.shape[0] // 2]
    if not np.all(np.isfinite(row)) or np.any(np.diff(row) <= 0):
        raise InputFileError(path, "wavelengths must be finite and increase along axis 1 "
                             "(canonical orientation)")
    return WavelengthMap(wave, header)


def _nominal_for(header, grating, *, nx, path, tilt_keyword="GRTILT"):
    from pipeline.core.headers import header_float

    tilt = header_float(header, tilt_keyword, path=path)
    if "BINSPEC" in header:
        binning = int(header_float(header, "BINSPEC", path=path, positive=True))
    else:
        raise InputFileError(path, "keyword BINSPEC missing; expected the binning along the "
                             "dispersion, written by calibrate_frame")
    return gr.model_from_config(grating, tilt_deg=tilt, binning=binning, nx_px=nx)


def solve_wavelength_file(*, arc, lines, solution, qa, plot_lines=None, plot_residuals=None,
                          plot_residual_map=None, plot_dispersion=None, grating, lamps,
                          setup="", tilt_keyword="GRTILT", lamps_keyword="LAMPS",
                          filter_keyword="FILTER",
                          line_list=None, exclude_line_sources=("memory",),
                          order_overlap_blue_limit_angstrom=gr.DEFAULT_BLUE_LIMIT_ANGSTROM,
                          tilt_search_deg=0.6, focal_length_search_fraction=0.035,
                          trace_band_rows=8, trace_min_snr=10.0, tilt_degree_x=2,
                          tilt_degree_y=2, tilt_clip_sigma=4.0, **options_1d):
    """Solve one calibrated arc and write the map, the QA table and the QA figures.

    Parameters
    ----------
    arc : str
        Calibrated arc frame (canonical orientation; header with GRTILT, LAMPS,
        BINSPEC, FILTER).
    lines : str
        Line table from :func:`pipeline.wavelength.arclines.find_arc_lines_file`.
    solution, qa : str
        Output paths: FITS map and QA ECSV.
    plot_lines, plot_residuals, plot_residual_map, plot_dispersion : str, optional
        Output PNG paths.
    grating : dict
        Config ``instrument.grating``.
    lamps : dict
        Config ``instrument.lamps``.
    setup : str
        Setup id (recorded in the header and QA).
    tilt_keyword, lamps_keyword, filter_keyword : str
        Header keywords of the grating tilt (deg), the lamps and the filter
        (config ``instrument.keywords``).
    line_list : str, optional
        Line list CSV (default: the shipped one).
    exclude_line_sources : sequence of str
    order_overlap_blue_limit_angstrom : float
    tilt_search_deg, focal_length_search_fraction : float
        Search ranges of the identification.
    trace_band_rows, trace_min_snr, tilt_degree_x, tilt_degree_y, tilt_clip_sigma
        2-D options (:func:`solve_wavelength`).
    **options_1d
        Further options of :func:`solve_1d`.

    Raises
    ------
    WavelengthSolutionError
        When no trustworthy solution is found (nothing is written).
    """
    import time

    from pipeline.wavelength.arclines import read_lines_table
    from pipeline.core.frames import read_frame
    from pipeline.core.headers import header_str
    from pipeline.wavelength.linelists import read_line_list, species_for_lamps
    from pipeline.core.provenance import stamp

    start = time.perf_counter()
    frame = read_frame(arc)
    ny, nx = frame.shape
    found = read_lines_table(lines)
    nominal = _nominal_for(frame.header, grating, nx=nx, path=arc, tilt_keyword=tilt_keyword)
    species = species_for_lamps(header_str(frame.header, lamps_keyword, path=arc, default=""),
                                lamps, path=arc, keyword=lamps_keyword)
    catalogue = read_line_list(line_list, species=species, exclude_sources=exclude_line_sources)
    first = found.info.get("band_first_row", ny // 2)
    last = found.info.get("band_last_row", ny // 2)
    try:
        sol = solve_wavelength(frame.data, frame.variance, frame.mask, found, catalogue, nominal,
                               reference_row=0.5 * (float(first) + float(last)),
                               trace_band_rows=trace_band_rows, trace_min_snr=trace_min_snr,
                               tilt_degree_x=tilt_degree_x, tilt_degree_y=tilt_degree_y,
                               tilt_clip_sigma=tilt_clip_sigma, tilt_range_deg=tilt_search_deg,
                               focal_range_fraction=focal_length_search_fraction, **options_1d)
    except WavelengthSolutionError as exc:
        raise WavelengthSolutionError(f"{arc} (setup {setup or '?'}): {exc}") from None
    filter_name = header_str(frame.header, filter_keyword, path=arc, default="NONE")
    cut_on = gr.filter_cut_on(grating, filter_name)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        gr.summarize_setup(sol.solution_1d.model, nx, filter_name=filter_name,
                           cut_on_angstrom=cut_on,
                           blue_limit_angstrom=order_overlap_blue_limit_angstrom)
    for w in caught:
        warnings.warn(f"{arc}: {w.message}", w.category, stacklevel=2)
    wave_map = sol.wavelength_map()
    elapsed = time.perf_counter() - start
    arc_name = Path(arc).name
    header = solution_header(sol, arc_header=frame.header, setup=setup, arc_name=arc_name)
    stamp(header, inputs=[arc, lines])

    from astropy.io import fits
    Path(solution).parent.mkdir(parents=True, exist_ok=True)
    fits.HDUList([fits.PrimaryHDU(wave_map, header=header), _lines_hdu(sol),
                  _trace_hdu(sol)]).writeto(solution, overwrite=True, checksum=True)
    metrics = qa_metrics(sol, setup=setup, arc_name=arc_name, filter_name=filter_name,
                         overlap=bool(caught), elapsed_s=elapsed)
    Path(qa).parent.mkdir(parents=True, exist_ok=True)
    qa_table(sol, metrics).write(qa, format="ascii.ecsv", overwrite=True)
    plots = {"lines": plot_lines, "residuals": plot_residuals, "residual_map": plot_residual_map,
             "dispersion": plot_dispersion}
    if any(plots.values()):
        from pipeline.wavelength import qa as qa_wavelength
        from pipeline.wavelength.arclines import extract_band

        band = extract_band(frame.data, frame.variance, frame.mask, center_row=int(
            round(0.5 * (float(first) + float(last)))), half_width_rows=int(
            round(0.5 * (float(last) - float(first)))))
        title = f"{arc_name}  {setup}".strip()
        qa_wavelength.write_figures(sol, band.flux, found, title=title, paths=plots)
    return sol
