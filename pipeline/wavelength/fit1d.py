"""1-D wavelength solution on the reference row: the grating model's free parameters plus a Chebyshev correction.

The model's free parameters (tilt, focal length and the position of the camera axis on
the detector, the latter with a weak prior) are fitted by robust non-linear least
squares, then a low-order Chebyshev correction in wavelength with iterative sigma
clipping (astropy ``sigma_clip``) on the normalised residuals, rematching with the
refined solution (:func:`solve_1d`).
"""

import math
import warnings
from dataclasses import dataclass, field
from functools import partial

import numpy as np
from astropy.stats import sigma_clip
from numpy.polynomial import chebyshev as cheb
from scipy import optimize

from pipeline.core.constants import SPEED_OF_LIGHT_KM_S
from pipeline.core.errors import ArcQualityWarning, WavelengthSolutionError
from pipeline.wavelength import grating as gr
from pipeline.wavelength.arclines import LineFlag
from pipeline.wavelength.identify import (isolated_lines, match_lines, merge_unresolved,
                                          search_grating_parameters)

__all__ = ["WavelengthSolution1D", "fit_grating_parameters", "solve_1d"]


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



def _to_unit(x, domain):
    lo, hi = domain
    return (2.0 * x - (lo + hi)) / (hi - lo)



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
