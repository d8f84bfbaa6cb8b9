"""Everything the writers of the ``extract_spectra`` step need, built by pure functions.

:func:`reduce_frame_outputs` is the one function the adapter
(:func:`pipeline.extraction.steps.extract_frame_file`) calls: it reduces the frame
(:func:`pipeline.extraction.frame.reduce_frame`) and builds the headers, file names
and tables of every product (:class:`FrameOutputs`), so the adapter only reads and
writes. The header cards are built by small functions tested on their own
(:func:`product_header`, :func:`frame_cards`, :func:`spectrum_cards`).
"""

import warnings
from dataclasses import dataclass

import numpy as np
from astropy.io import fits
from astropy.table import Table

from pipeline.core import provenance
from pipeline.core.checks import merge_options
from pipeline.core.errors import InputFileWarning
from pipeline.core.headers import is_raw_geometry_keyword
from pipeline.core.spectra import LISTING_COLUMNS, spectrum_file_name
from pipeline.extraction.frame import TRACING_DEFAULTS, reduce_frame
from pipeline.extraction.rectify import slit_wcs_cards
from pipeline.extraction.trace import traces_to_table

__all__ = ["FrameOutputs", "SpectrumOutput", "reduce_frame_outputs", "frame_outputs",
           "product_header", "frame_cards", "spectrum_cards", "object_labels",
           "slit_position_arcsec", "expected_target_offset"]

#: storage keywords of the calibrated frame, never copied into products
_NOT_COPIED = ("SIMPLE", "BITPIX", "NAXIS", "NAXIS1", "NAXIS2", "EXTEND", "BZERO", "BSCALE",
               "BLANK", "CHECKSUM", "DATASUM", "BUNIT", "EXTNAME", "PCOUNT", "GCOUNT",
               "XTENSION")


def product_header(header):
    """Observation keywords of the calibrated frame, without structure, WCS or provenance.

    Pixel-grid keywords (any WCS convention, axis-indexed families, pixel sections) are
    dropped by the generic rule of :func:`pipeline.core.headers.is_raw_geometry_keyword`.

    Examples
    --------
    >>> h = fits.Header({"OBJECT": "TRS-17", "NAXIS": 2, "CRPIX1": 3.0, "EXPTIME": 60.0})
    >>> list(product_header(h).keys())
    ['OBJECT', 'EXPTIME']
    """
    present = set(header.keys())
    out = fits.Header()
    for card in header.cards:
        key = card.keyword
        if (not key or key in _NOT_COPIED or key in ("COMMENT", "HISTORY", "")
                or is_raw_geometry_keyword(key, card.value, header_keywords=present)
                or (key[:5] in ("INPUT", "CALIB") and key[5:].isdigit())
                or key in ("PIPEVERS", "PIPESTEP", "CFGHASH", "DATE")):
            continue
        out.append(card)
    return out


def slit_position_arcsec(row_px, ny, arcsec_per_px):
    """Position along the slit (arcsec, 0 at the middle row) of a rectified row.

    Examples
    --------
    >>> slit_position_arcsec(12.0, 21, 0.5)
    1.0
    """
    return float((row_px - 0.5 * (ny - 1)) * arcsec_per_px)


def frame_cards(reduction, *, frame_id, frame_type, setup):
    """Cards ``(keyword, value, comment)`` every product of the frame carries.

    Frame identity (SETUP FRAMEID FRAMETYP), flexure (FLEXPIX FLEXERR FLEXKMS FLEXSTAT),
    SKYSUB, the rectification's VARCORR and the noise model (VARRN VARGAIN VARFLAT).
    """
    flex = reduction.flexure
    a_var, b_var, c_var = reduction.sky_info["variance_coefficients"]
    return [
        ("SETUP", str(setup), "instrument setup id (night inventory)"),
        ("FRAMEID", str(frame_id), "frame id of the exposure"),
        ("FRAMETYP", str(frame_type), "standard or science"),
        ("FLEXPIX", round(float(flex.shift_px), 5), "flexure shift applied, px (+ = to larger x)"),
        ("FLEXERR", round(float(flex.shift_err_px), 5) if np.isfinite(flex.shift_err_px)
         else -1.0, "its 1-sigma error, px (-1 = not measured)"),
        ("FLEXKMS", round(float(flex.shift_kms), 4), "flexure shift as a velocity, km/s"),
        ("FLEXSTAT", flex.status, "flexure measurement status"),
        ("SKYSUB", True, "night sky subtracted (Kelson 2003 b-spline)"),
        ("VARCORR", round(float(reduction.rectified.info["variance_correlation"]), 4),
         "var of long sums along x / sum of pixel vars"),
        ("VARRN", round(float(a_var), 4), "variance model: constant term, e2"),
        ("VARGAIN", round(float(b_var), 5), "variance model: e2 per e of signal"),
        ("VARFLAT", float(f"{c_var:.5g}"), "variance model: flat term, per e2 of signal"),
    ]


def object_labels(roles):
    """File labels of the objects on the slit: ``target``, then ``other1``, ``other2``, ...

    Examples
    --------
    >>> object_labels(("target", "other", "other"))
    ['target', 'other1', 'other2']
    >>> object_labels(("other",))
    ['other1']
    """
    labels, k = [], 0
    for role in roles:
        if role == "target":
            labels.append("target")
        else:
            k += 1
            labels.append(f"other{k}")
    return labels


def spectrum_cards(trace, half_width_px, extraction, *, role, label, n_objects, ny,
                   arcsec_per_px, expected_target_arcsec):
    """Cards ``(keyword, value, comment)`` of one object's 1-D product.

    Examples
    --------
    >>> from pipeline.extraction.trace import fixed_trace
    >>> from types import SimpleNamespace
    >>> ex = SimpleNamespace(info={"snr_median": 12.0, "n_rejected": 3})
    >>> cards = spectrum_cards(fixed_trace([4000.0, 6000.0], 30.0, 4.0, 50.0), 6.0, ex,
    ...                        role="target", label="target", n_objects=1, ny=61,
    ...                        arcsec_per_px=0.5, expected_target_arcsec=0.0)
    >>> values = {k: v for k, v, _ in cards}
    >>> values["OBJROLE"], values["OBJPOSAS"]
    ('target', 0.0)
    """
    centre = float(trace.centre_px)
    return [
        ("OBJROLE", str(role), "target or other (object on the slit)"),
        ("OBJLABEL", str(label), "target, other1, other2... (file name label)"),
        ("NOBJECTS", int(n_objects), "objects traced on this frame"),
        ("EXPECTAS", round(float(expected_target_arcsec), 4),
         "expected target place, arcsec from slit centre"),
        ("OBJPOSPX", round(centre, 4), "trace centre at OBJREFWL, rectified row"),
        ("OBJPOSAS", round(slit_position_arcsec(centre, ny, arcsec_per_px), 4),
         "same, arcsec from the slit centre"),
        ("OBJREFWL", round(float(trace.reference_wave_angstrom), 3),
         "wavelength of OBJPOSPX, Angstrom"),
        ("BOXHALFW", round(float(half_width_px), 4), "boxcar half width, rows"),
        ("SPATFWHM", round(float(trace.fwhm_px), 4), "spatial FWHM of the profile, rows"),
        ("TRCMODE", trace.mode, "own, reference (offset fitted) or fixed"),
        ("TRCREF", str(trace.reference)[:60], "reference of the trace shape"),
        ("EXTMETH", "optimal", "HDU 0; boxcar sum in SUMFLUX"),
        ("SNRMED", round(float(extraction.info["snr_median"]), 3),
         "median S/N per pixel, optimal"),
        ("NREJECT", int(extraction.info["n_rejected"]), "pixels rejected in the profile fit"),
    ]


def _with_cards(header, cards):
    out = header.copy()
    for key, value, comment in cards:
        out[key] = (value, comment)
    return out


@dataclass(frozen=True)
class SpectrumOutput:
    """One object's 1-D product: file name (in the spectra folder), HDU-0 header, arrays.

    ``extraction`` is the :class:`pipeline.extraction.extract.Extraction`.
    """

    file_name: str
    header: fits.Header
    extraction: object


@dataclass(frozen=True)
class FrameOutputs:
    """What the writers of one frame need.

    Attributes
    ----------
    reduction : pipeline.extraction.frame.FrameReduction
    object_name : str
        OBJECT of the frame (the frame id when missing).
    arcsec_per_px : float
        Slit scale of one rectified row.
    rectified_header : astropy.io.fits.Header
        PRIMARY header of the rectified frame (WCS AWAV x SLITPOS, provenance).
    image_wcs_cards : list of tuple
        WCS cards of every image extension of the rectified frame.
    spectra : tuple of SpectrumOutput
        The target first, then the other objects on the slit.
    listing : astropy.table.Table
        ``extraction.ecsv`` (columns :data:`pipeline.core.spectra.LISTING_COLUMNS`).
    trace_table, flexure_table : astropy.table.Table
    title : str
        Title of the QA figures.
    """

    reduction: object
    object_name: str
    arcsec_per_px: float
    rectified_header: fits.Header
    image_wcs_cards: list
    spectra: tuple
    listing: Table
    trace_table: Table
    flexure_table: Table
    title: str


def _flexure_table(flex, frame_id):
    table = Table(flex.lines, copy=True) if len(flex.lines.colnames) else Table()
    table.meta.update({"frame_id": str(frame_id), "shift_px": float(flex.shift_px),
                       "shift_err_px": float(flex.shift_err_px),
                       "shift_kms": float(flex.shift_kms), "status": flex.status,
                       "n_used": int(flex.info.get("n_used", 0)),
                       "description": "night-sky lines fitted for the flexure shift "
                                      "(pipeline.extraction.flexure)"})
    return table


def frame_outputs(header, reduction, *, frame_id, frame_type, setup, arcsec_per_px,
                  inputs=(), calibrations=()):
    """Headers, names and tables of every product of a reduced frame.

    Parameters
    ----------
    header : astropy.io.fits.Header
        Header of the calibrated frame.
    reduction : pipeline.extraction.frame.FrameReduction
    frame_id, frame_type, setup : str
    arcsec_per_px : float
        Slit scale of one (binned) row.
    inputs, calibrations : sequence of str
        File names for the provenance keywords.

    Returns
    -------
    FrameOutputs
    """
    grid = reduction.rectified.grid
    ny = reduction.rectified.data.shape[0]
    object_name = str(header.get("OBJECT", frame_id))
    base = _with_cards(product_header(header),
                       frame_cards(reduction, frame_id=frame_id, frame_type=frame_type,
                                   setup=setup))
    wcs_cards = grid.wcs_cards(axis=1) + slit_wcs_cards(ny, arcsec_per_px, axis=2)
    rect_header = base.copy()
    for card in wcs_cards:
        rect_header[card[0]] = card[1:]
    rect_header["WCSAXES"] = 2
    rect_header.setdefault("SPECSYS", "TOPOCENT")
    provenance.stamp(rect_header, inputs=inputs, calibrations=calibrations)

    spectra, rows = [], []
    n_objects = len(reduction.traces)
    roles = tuple(reduction.roles) or ("target",) + ("other",) * max(n_objects - 1, 0)
    labels = object_labels(roles)
    expected_arcsec = slit_position_arcsec(
        reduction.objects_info.get("expected_target_row_px", 0.5 * (ny - 1)), ny,
        arcsec_per_px)
    for trace, half, ex, role, label in zip(reduction.traces, reduction.half_widths_px,
                                            reduction.extractions, roles, labels):
        name = spectrum_file_name(object_name, label)
        hdr = _with_cards(base, spectrum_cards(trace, half, ex, role=role, label=label,
                                               n_objects=n_objects, ny=ny,
                                               arcsec_per_px=arcsec_per_px,
                                               expected_target_arcsec=expected_arcsec))
        provenance.stamp(hdr, inputs=inputs, calibrations=calibrations)
        spectra.append(SpectrumOutput(name, hdr, ex))
        good = ex.mask == 0
        rows.append([str(frame_id), object_name, role, label, name, trace.centre_px,
                     slit_position_arcsec(trace.centre_px, ny, arcsec_per_px), trace.fwhm_px,
                     trace.mode, float(ex.info["snr_median"]), float(np.sum(ex.flux[good])),
                     "ok"])
    listing = Table(rows=rows or None, names=LISTING_COLUMNS,
                    dtype=[str, str, str, str, str, float, float, float, str, float, float,
                           str])
    listing.meta.update({"frame_id": str(frame_id), "setup": str(setup),
                         "wavelength_start_angstrom": float(grid.centres_angstrom()[0]),
                         "expected_target_arcsec": float(expected_arcsec),
                         "not_sources": [dict(c) for c in
                                         reduction.objects_info.get("not_sources", [])],
                         "description": "1-D spectra written for this frame "
                                        "(pipeline.core.spectra)"})
    traces = traces_to_table(reduction.traces, frame_id=str(frame_id), object_name=object_name,
                             roles=roles, labels=labels)
    return FrameOutputs(reduction, object_name, float(arcsec_per_px), rect_header, wcs_cards,
                        tuple(spectra), listing, traces,
                        _flexure_table(reduction.flexure, frame_id),
                        f"{frame_id}  {object_name}  ({frame_type}, {setup})")


def expected_target_offset(header, *, offset_arcsec=0.0, keyword=None):
    """Where the target is expected along the slit, arcsec from the slit centre.

    The value of ``keyword`` in the frame header when it is configured and holds a
    number, else ``offset_arcsec`` (``tracing.target_offset_arcsec``; default 0: the
    slit centre). A keyword that is configured but missing or not a number gives a
    warning naming it.

    Examples
    --------
    >>> expected_target_offset(fits.Header({"SLITOFF": -9.5}), keyword="SLITOFF")
    -9.5
    >>> expected_target_offset(fits.Header(), offset_arcsec=1.5)
    1.5
    """
    if keyword:
        value = header.get(keyword)
        try:
            number = float(value)
        except (TypeError, ValueError):
            number = float("nan")
        if np.isfinite(number):
            return number
        warnings.warn(f"keyword {keyword} (tracing.target_offset_keyword) is "
                      f"{'missing' if value is None else repr(value)}; expected the target's "
                      f"offset along the slit in arcsec; using {offset_arcsec:g} arcsec",
                      InputFileWarning)
    return float(offset_arcsec)


def reduce_frame_outputs(data, variance, mask, header, wave_map, *, frame_id, frame_type,
                         setup, arcsec_per_px, line_wave_angstrom=(), line_species=None,
                         reference_trace=None, reference_name="", rectification=None,
                         flexure=None, sky=None, tracing=None, extraction=None, inputs=(),
                         calibrations=()):
    """Reduce one calibrated frame and build every product's header, name and table.

    The arrays and options are those of :func:`pipeline.extraction.frame.reduce_frame`;
    the rest those of :func:`frame_outputs`.

    Returns
    -------
    FrameOutputs
    """
    options = merge_options(tracing, TRACING_DEFAULTS, "tracing")
    reduction = reduce_frame(data, variance, mask, wave_map,
                             line_wave_angstrom=line_wave_angstrom, line_species=line_species,
                             spatial_scale_arcsec_per_px=arcsec_per_px,
                             reference_trace=reference_trace, reference_name=reference_name,
                             target_offset_arcsec=expected_target_offset(
                                 header, offset_arcsec=options["target_offset_arcsec"],
                                 keyword=options["target_offset_keyword"]),
                             rectification=rectification, flexure=flexure, sky=sky,
                             tracing=tracing, extraction=extraction)
    return frame_outputs(header, reduction, frame_id=frame_id, frame_type=frame_type,
                         setup=setup, arcsec_per_px=arcsec_per_px, inputs=inputs,
                         calibrations=calibrations)

