"""The adapter of the ``extract_spectra`` rule: read, call one pure function, write.

The science lives in :mod:`pipeline.extraction.frame` (the reduction) and
:mod:`pipeline.extraction.outputs` (headers, names and tables of the products).
"""

import warnings
from pathlib import Path

import numpy as np
from astropy.io import fits

from pipeline.core.checks import merge_options
from pipeline.core.errors import InputFileError, InputFileWarning
from pipeline.core.frames import Frame, read_frame, write_frame
from pipeline.core.spectra import write_spectrum
from pipeline.extraction import skylines
from pipeline.extraction.frame import FLEXURE_DEFAULTS
from pipeline.extraction.outputs import reduce_frame_outputs
from pipeline.extraction.products import load_reference_trace
from pipeline.extraction.qa import plot_rectified_frame, plot_spectra
from pipeline.extraction.trace import TracingWarning

from pipeline.wavelength.products import load_wavelength_map

__all__ = ["extract_frame_file"]


def _as_path_or_none(value):
    """A rule input that may be absent: None, '' or an empty list mean none."""
    if isinstance(value, (list, tuple)):
        value = value[0] if value else None
    return None if value in (None, "") else str(value)


def _image_hdu(values, name, comment, wcs_cards, dtype=np.float32):
    header = fits.Header()
    for card in wcs_cards:
        header[card[0]] = card[1:]
    header["COMMENT"] = comment
    return fits.ImageHDU(np.asarray(values, dtype=dtype), header=header, name=name)


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
        Trace table of the setup's standard star (its own trace gives the shape that
        faint objects borrow).
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

    Returns
    -------
    pipeline.extraction.outputs.FrameOutputs
    """
    flexure_options = merge_options(flexure, FLEXURE_DEFAULTS, "flexure")
    if sky_lines:
        flexure_options["line_list"] = sky_lines
    cal = read_frame(frame)
    wave_map = np.asarray(load_wavelength_map(wavelength).wave_angstrom, float)
    if wave_map.shape != cal.shape:
        raise InputFileError(wavelength, f"wavelength map shape {wave_map.shape} differs from "
                             f"the calibrated frame {frame} {cal.shape}; expected the solution "
                             "of an arc of the same setup and binning")
    binspat = cal.header.get("BINSPAT")
    if binspat is None:
        warnings.warn(f"{frame}: keyword BINSPAT missing; expected the binning along the slit; "
                      "assuming 1", InputFileWarning)
        binspat = 1
    lines = skylines.load_sky_lines(flexure_options["line_list"],
                                    verified_only=not flexure_options["use_unverified_lines"])
    reference_path = _as_path_or_none(reference)
    ref_trace, ref_name = (load_reference_trace(reference_path) if reference_path
                           else (None, ""))

    out = reduce_frame_outputs(
        cal.data, cal.variance, cal.mask, cal.header, wave_map, frame_id=frame_id,
        frame_type=frame_type, setup=setup,
        arcsec_per_px=float(spatial_scale_arcsec_per_px) * float(binspat),
        line_wave_angstrom=np.asarray(lines["wavelength_air_angstrom"], float),
        line_species=[str(x) for x in lines["species"]], reference_trace=ref_trace,
        reference_name=ref_name, rectification=rectification, flexure=flexure_options,
        sky=sky, tracing=tracing, extraction=extraction,
        inputs=[frame, wavelength] + ([reference_path] if reference_path else []),
        calibrations=[wavelength])
    red = out.reduction

    cards = out.image_wcs_cards
    extra = [_image_hdu(red.sky, "SKY", "sky model subtracted from PRIMARY, electron", cards),
             _image_hdu(red.sky_variance, "SKYVAR", "variance of the sky model (correlated "
                        "along the slit), electron2", cards),
             _image_hdu(red.background_variance, "BKGVAR", "noise-free variance of read noise "
                        "and sky, electron2", cards),
             _image_hdu(red.signal_variance_factor, "SIGVARF", "variance per electron of "
                        "object signal", cards),
             _image_hdu(red.signal_variance_quadratic, "SIGVARQ", "flat-field variance term "
                        "q: q*(m**2+2*SKY*m) for signal m", cards),
             _image_hdu(red.sky_region, "SKYREG", "1 = pixel used as sky", cards,
                        dtype=np.uint8)]
    write_frame(Frame(red.rectified.data, red.rectified.variance, red.rectified.mask,
                      out.rectified_header, cal.unit), rectified, extra_hdus=extra)
    Path(flexure_table).parent.mkdir(parents=True, exist_ok=True)
    out.flexure_table.write(flexure_table, format="ascii.ecsv", overwrite=True)
    Path(traces).parent.mkdir(parents=True, exist_ok=True)
    out.trace_table.write(traces, format="ascii.ecsv", overwrite=True)

    out_dir = Path(spectra)
    out_dir.mkdir(parents=True, exist_ok=True)
    grid = red.rectified.grid
    for spec in out.spectra:
        ex = spec.extraction
        write_spectrum(out_dir / spec.file_name, grid, spec.header, flux=ex.flux,
                       variance=ex.variance, mask=ex.mask, boxcar_flux=ex.boxcar_flux,
                       boxcar_variance=ex.boxcar_variance, boxcar_mask=ex.boxcar_mask,
                       sky=ex.sky, trace_px=ex.trace_px)
    out.listing.write(out_dir / "extraction.ecsv", format="ascii.ecsv", overwrite=True)
    if not out.spectra:
        warnings.warn(f"{frame}: no object above the detection threshold; no spectrum written",
                      TracingWarning)
    plot_rectified_frame(red, qa_rectified, title=out.title, arcsec_per_px=out.arcsec_per_px)
    plot_spectra(red, qa_spectra, title=out.title)
    return out
