"""What the wavelength-solution file and its QA table hold: header cards, line and trace tables, metrics.

The product is a FITS file whose PRIMARY HDU is the dense map ``lambda(y, x)``
(float64, Angstrom, air) on the calibrated frame's pixels. Its header holds the fitted
physical model as FITS WCS (Greisen et al. 2006, ``AWAV-GRA``, for the reference row)
with the Chebyshev correction and the line-tilt polynomial beside it (keywords listed
in :data:`HEADER_KEYWORDS`); extension ``LINES`` lists the identified lines and
``TRACE`` the traced points. The reader is :func:`pipeline.wavelength.products.load_wavelength_map`.

References
----------
Greisen, E. W., Calabretta, M. R., Valdes, F. G., & Allen, S. L. 2006, A&A 446, 747.
"""

import math
import time
import warnings
from dataclasses import dataclass, field

import numpy as np

from pipeline.core.constants import SPEED_OF_LIGHT_KM_S
from pipeline.core.errors import WavelengthSolutionError
from pipeline.wavelength import grating as gr
from pipeline.wavelength.solve import solve_wavelength

__all__ = ["HEADER_KEYWORDS", "solution_header", "lines_hdu", "trace_hdu", "qa_metrics",
           "qa_table", "ArcSolution", "solve_arc"]

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
        added, see :data:`HEADER_KEYWORDS`); axis 2 is the detector row along the slit
        (``CTYPE2 = 'SLITROW'``, a linear coordinate of our own, in pixels, 0-based).
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
    h["CTYPE2"] = ("SLITROW", "detector row along the slit (0-based)")
    h["CUNIT2"] = ("pixel", "")
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

def lines_hdu(solution):
    """BinTable HDU ``LINES``: the identified lines, their residuals and whether used."""
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

def trace_hdu(solution):
    """BinTable HDU ``TRACE``: every traced point, its residual and whether used."""
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
class ArcSolution:
    """Everything the wavelength-solution file and its QA table hold.

    Attributes
    ----------
    solution : pipeline.wavelength.tilt.WavelengthSolution2D
    wave_map : ndarray, shape (ny, nx), float64, Angstrom (air)
    header : astropy.io.fits.Header
        Without provenance (the adapter stamps it).
    metrics : dict
        :func:`qa_metrics` (the QA table's metadata).
    overlap_messages : list of str
        Order-overlap warnings of the fitted setup (also warned).
    """

    solution: object
    wave_map: np.ndarray
    header: object
    metrics: dict
    overlap_messages: list = field(default_factory=list)


def solve_arc(data, variance, mask, found, line_list, nominal, *, arc_header=None, grating,
              setup="", arc_name="", name="arc", filter_name="NONE",
              order_overlap_blue_limit_angstrom=gr.DEFAULT_BLUE_LIMIT_ANGSTROM,
              tilt_search_deg=0.6, focal_length_search_fraction=0.035, trace_band_rows=8,
              trace_min_snr=10.0, tilt_degree_x=2, tilt_degree_y=2, tilt_clip_sigma=4.0,
              **options_1d):
    """Solve one calibrated arc and build the product (rule ``solve_wavelength``).

    Parameters
    ----------
    data, variance, mask : ndarray, shape (ny, nx)
        Calibrated arc (canonical orientation).
    found : pipeline.wavelength.arclines.ArcLines
        Lines measured on the reference band (``info['band_first_row'/'band_last_row']``).
    line_list : pipeline.wavelength.linelists.LineList
    nominal : pipeline.wavelength.grating.GratingModel
    arc_header : astropy.io.fits.Header, optional
    grating : dict
        Config ``instrument.grating`` (filter cut-on of the order-overlap check).
    setup, arc_name : str
        Recorded in the header and QA.
    name : str
        Names the arc in error messages and warnings.
    filter_name : str
    Other keywords
        As :func:`pipeline.wavelength.solve.solve_wavelength` and :func:`pipeline.wavelength.fit1d.solve_1d`.

    Returns
    -------
    ArcSolution

    Raises
    ------
    WavelengthSolutionError
        Naming the arc and the setup, when no trustworthy solution is found.
    """
    start = time.perf_counter()
    ny = np.shape(data)[0]
    first = found.info.get("band_first_row", ny // 2)
    last = found.info.get("band_last_row", ny // 2)
    try:
        sol = solve_wavelength(data, variance, mask, found, line_list, nominal,
                               reference_row=0.5 * (float(first) + float(last)),
                               trace_band_rows=trace_band_rows, trace_min_snr=trace_min_snr,
                               tilt_degree_x=tilt_degree_x, tilt_degree_y=tilt_degree_y,
                               tilt_clip_sigma=tilt_clip_sigma, tilt_range_deg=tilt_search_deg,
                               focal_range_fraction=focal_length_search_fraction, **options_1d)
    except WavelengthSolutionError as exc:
        raise WavelengthSolutionError(f"{name} (setup {setup or '?'}): {exc}") from None
    cut_on = gr.filter_cut_on(grating, filter_name)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        gr.summarize_setup(sol.solution_1d.model, np.shape(data)[1], filter_name=filter_name,
                           cut_on_angstrom=cut_on,
                           blue_limit_angstrom=order_overlap_blue_limit_angstrom)
    for w in caught:
        warnings.warn(f"{name}: {w.message}", w.category, stacklevel=2)
    wave_map = sol.wavelength_map()
    header = solution_header(sol, arc_header=arc_header, setup=setup, arc_name=arc_name)
    metrics = qa_metrics(sol, setup=setup, arc_name=arc_name, filter_name=filter_name,
                         overlap=bool(caught), elapsed_s=time.perf_counter() - start)
    return ArcSolution(sol, wave_map, header, metrics, [str(w.message) for w in caught])
