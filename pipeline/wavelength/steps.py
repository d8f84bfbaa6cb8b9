"""The wavelength step's rule adapters: read the inputs, call one pure function, write the outputs.

``find_arc_lines`` (:func:`find_arc_lines_file`) and ``solve_wavelength``
(:func:`solve_wavelength_file`); their keyword arguments are the rule's named inputs,
outputs and params.
"""

import warnings
from pathlib import Path

from pipeline.core.errors import ArcQualityWarning, InputFileError
from pipeline.core.headers import header_float, header_str
from pipeline.wavelength import grating as gr
from pipeline.wavelength.arclines import (extract_band, find_arc_lines, lines_table,
                                          read_lines_table)

__all__ = ["find_arc_lines_file", "solve_wavelength_file", "nominal_model"]

#: Header keywords of the arc copied into the line table's metadata.
_ARC_KEYWORDS = ("OBJECT", "DATE-OBS", "EXPTIME", "GRATING", "GRTILT", "SLITWID", "FILTER",
                 "LAMPS", "BINSPEC", "BINSPAT", "SETUP")


def find_arc_lines_file(*, arc, lines, center_band_half_width_rows=5, detection_snr=10.0,
                        min_separation_px=2.0, continuum_window_px=61, continuum_percentile=10.0,
                        fwhm_guess_px=None, fit_half_width_fwhm=1.5, blend_separation_fwhm=2.0,
                        broad_fwhm_ratio=1.15, deblend_passes=4, saturation_e=None):
    """Find and measure the lines of a calibrated arc frame; write them as ECSV.

    Parameters
    ----------
    arc : str
        Calibrated arc frame (:func:`pipeline.core.frames.read_frame` layout, canonical
        orientation).
    lines : str
        Output ECSV path.
    center_band_half_width_rows : int
        Rows summed on each side of the middle row of the slit.
    Other parameters
        As :func:`find_arc_lines`.
    """
    from pipeline.core.frames import read_frame  # frames I/O only when the rule runs

    frame = read_frame(arc)
    ny, nx = frame.shape
    if nx < 50:
        raise InputFileError(arc, f"data has only {nx} pixels along the dispersion (axis 1); "
                             "expected a calibrated arc in canonical orientation")
    band = extract_band(frame.data, frame.variance, frame.mask,
                        half_width_rows=center_band_half_width_rows)
    found = find_arc_lines(band.flux, band.variance, mask=band.mask, detection_snr=detection_snr,
                           min_separation_px=min_separation_px,
                           continuum_window_px=continuum_window_px,
                           continuum_percentile=continuum_percentile, fwhm_guess_px=fwhm_guess_px,
                           fit_half_width_fwhm=fit_half_width_fwhm,
                           blend_separation_fwhm=blend_separation_fwhm,
                           broad_fwhm_ratio=broad_fwhm_ratio, deblend_passes=deblend_passes,
                           saturation_e=saturation_e)
    if len(found) == 0:
        warnings.warn(f"{arc}: no arc line above {detection_snr} sigma in rows "
                      f"{band.rows[0]}-{band.rows[1]}", ArcQualityWarning, stacklevel=2)
    meta = {"arc_frame": str(arc), "band_first_row": band.rows[0], "band_last_row": band.rows[1],
            "ny": ny, "nx": nx}
    for key in _ARC_KEYWORDS:
        if key in frame.header:
            meta[key] = frame.header[key]
    table = lines_table(found, meta=meta)
    Path(lines).parent.mkdir(parents=True, exist_ok=True)
    table.write(lines, format="ascii.ecsv", overwrite=True)
    return table


def nominal_model(header, grating, *, nx, path, tilt_keyword="GRTILT"):
    """The nominal grating model of a calibrated arc: config optics, header tilt and binning.

    Raises :class:`~pipeline.core.errors.InputFileError` naming ``path`` when the tilt
    keyword or ``BINSPEC`` is missing or not a number.
    """
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
        Line table from :func:`find_arc_lines_file`.
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
    # imported here, not at the top: a find_arc_lines job need not pay for the solver
    from astropy.io import fits

    from pipeline.core.frames import read_frame
    from pipeline.core.provenance import stamp
    from pipeline.wavelength.linelists import read_line_list, species_for_lamps
    from pipeline.wavelength.solution_product import lines_hdu, qa_table, solve_arc, trace_hdu

    frame = read_frame(arc)
    ny, nx = frame.shape
    found = read_lines_table(lines)
    nominal = nominal_model(frame.header, grating, nx=nx, path=arc, tilt_keyword=tilt_keyword)
    species = species_for_lamps(header_str(frame.header, lamps_keyword, path=arc, default=""),
                                lamps, path=arc, keyword=lamps_keyword)
    catalogue = read_line_list(line_list, species=species, exclude_sources=exclude_line_sources)
    arc_name = Path(arc).name
    product = solve_arc(
        frame.data, frame.variance, frame.mask, found, catalogue, nominal,
        arc_header=frame.header, grating=grating, setup=setup, arc_name=arc_name, name=arc,
        filter_name=header_str(frame.header, filter_keyword, path=arc, default="NONE"),
        order_overlap_blue_limit_angstrom=order_overlap_blue_limit_angstrom,
        tilt_search_deg=tilt_search_deg, focal_length_search_fraction=focal_length_search_fraction,
        trace_band_rows=trace_band_rows, trace_min_snr=trace_min_snr, tilt_degree_x=tilt_degree_x,
        tilt_degree_y=tilt_degree_y, tilt_clip_sigma=tilt_clip_sigma, **options_1d)
    sol, header = product.solution, product.header
    stamp(header, inputs=[arc, lines])
    Path(solution).parent.mkdir(parents=True, exist_ok=True)
    fits.HDUList([fits.PrimaryHDU(product.wave_map, header=header), lines_hdu(sol),
                  trace_hdu(sol)]).writeto(solution, overwrite=True, checksum=True)
    Path(qa).parent.mkdir(parents=True, exist_ok=True)
    qa_table(sol, product.metrics).write(qa, format="ascii.ecsv", overwrite=True)
    plots = {"lines": plot_lines, "residuals": plot_residuals, "residual_map": plot_residual_map,
             "dispersion": plot_dispersion}
    if any(plots.values()):
        from pipeline.wavelength import qa as qa_wavelength

        first = found.info.get("band_first_row", ny // 2)
        last = found.info.get("band_last_row", ny // 2)
        band = extract_band(frame.data, frame.variance, frame.mask, center_row=int(
            round(0.5 * (float(first) + float(last)))), half_width_rows=int(
            round(0.5 * (float(last) - float(first)))))
        title = f"{arc_name}  {setup}".strip()
        qa_wavelength.write_figures(sol, band.flux, found, title=title, paths=plots)
    return sol
