"""Wavelength solution of one arc: identification, 1-D fit, line tracing and tilt, in one pure function.

:func:`solve_wavelength` chains :func:`pipeline.wavelength.fit1d.solve_1d` (which uses
:mod:`pipeline.wavelength.identify`) and :mod:`pipeline.wavelength.tilt`. A setup whose
identification fails raises :class:`~pipeline.core.errors.WavelengthSolutionError` with
the reason; no solution is written then.
"""

import math

import numpy as np

from pipeline.wavelength.fit1d import solve_1d
from pipeline.wavelength.tilt import fit_line_tilt, predicted_positions, trace_lines

__all__ = ["solve_wavelength"]


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
