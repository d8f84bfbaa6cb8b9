"""The CCD step's rule adapters: read the inputs, call one pure function, write the outputs.

One adapter per rule: ``master_bias`` (:func:`make_master_bias_file`), ``master_flat``
(:func:`make_master_flat_file`) and ``calibrate_frame`` (:func:`calibrate_frame_file`).
Their keyword arguments are the rule's named inputs, outputs and params.
"""

import logging
import warnings
from pathlib import Path

from pipeline.core import headers as hdr
from pipeline.core.checks import merge_options
from pipeline.core.errors import CalibrationError, CalibrationQualityWarning, InputFileError
from pipeline.ccd.bias import master_bias
from pipeline.ccd.cards import calibrated_header
from pipeline.ccd.flat import FLAT_QA_COLUMNS, master_flat
from pipeline.ccd.frame import calibrate_raw_frame
from pipeline.ccd.options import (BIAS_DEFAULTS, CALIBRATION_DEFAULTS, FLAT_DEFAULTS,
                                  overscan_kwargs)
from pipeline.ccd.rawio import RawRows, read_master, read_raw

__all__ = ["make_master_bias_file", "make_master_flat_file", "calibrate_frame_file"]

log = logging.getLogger("pipeline.ccd.steps")

#: raw keywords that describe one exposure, not a master calibration
_EXPOSURE_KEYWORDS = ("OBJECT", "EXPTIME", "DATE-OBS", "IMAGETYP")


def _write_qa_table(table_rows, names, meta, path):
    from astropy.table import Table
    table = Table(rows=table_rows or None, names=names) if table_rows else Table(names=names)
    table.meta.update(meta)
    Path(path).parent.mkdir(parents=True, exist_ok=True)
    table.write(path, format="ascii.ecsv", overwrite=True)


def _configured(header, instrument, name, *, path):
    return hdr.keyword_or_value(header, instrument.get(name), path=path, name=name)


def _as_list(value):
    return [value] if isinstance(value, (str, Path)) else list(value)


def _master_header(raw_header, layout, kind, instrument, cards):
    header = calibrated_header(raw_header, layout, kind, instrument)
    for key in _EXPOSURE_KEYWORDS:
        if key in header:
            header.remove(key)
    for key, value, comment in cards:
        header[key] = (value, comment)
    return header


def make_master_bias_file(*, frames, master, qa, instrument, overscan=None, bias=None):
    """Master bias of one readout mode from raw bias files (rule ``master_bias``).

    Parameters
    ----------
    frames : list of str
        Raw bias files (all of the same readout mode).
    master : str
        Output frame: PRIMARY = bias in ADU (canonical orientation), VAR =
        its variance (ADU^2), MASK = BAD_PIXEL where fewer than half the frames
        survived clipping. Header: ``NFRAMES``, ``RNMEAS`` (ADU), ``RNMEASE``
        (e-, with the configured gain), ``RNOK`` (within ``RNTOL`` of the
        configured value), orientation and trim keywords.
    qa : str
        ECSV: one row per frame (overscan level and scatter); the measured and
        configured read noise in the table meta.
    instrument : dict
        CCD part of the instrument config (sections, gain, read noise,
        saturation, dispersion axis and direction, pixel extension, binning keyword).
    overscan, bias : dict
        The ``overscan`` and ``bias`` config sections.
    """
    from pipeline.core.frames import Frame, write_frame
    from pipeline.core.provenance import stamp

    paths = _as_list(frames)
    if not paths:
        raise CalibrationError(f"{master}: no bias frame given")
    ov_opts = overscan_kwargs(overscan)
    opts = merge_options(bias, BIAS_DEFAULTS, "bias")
    readers, unreadable = [], []
    try:
        for p in paths:
            try:
                readers.append(RawRows(p, instrument, ov_opts))
            except InputFileError as exc:      # one bad bias must not lose the master
                unreadable.append(str(exc))
        if not readers:
            raise CalibrationError(f"{master}: no usable bias frame: " + "; ".join(unreadable))
        for text in unreadable:
            warnings.warn(f"{master}: bias frame left out: {text}", CalibrationQualityWarning)
        shapes = {r.shape for r in readers}
        if len(shapes) > 1:
            raise CalibrationError(f"{master}: bias frames differ in trimmed shape "
                                   f"{sorted(shapes)}; expected one readout mode")
        first = readers[0]
        gain_conf = _configured(first.header, instrument, "gain_e_per_adu", path=first.path)
        rn_conf = _configured(first.header, instrument, "read_noise_e", path=first.path)
        product = master_bias(readers, orientation=first.layout.orientation,
                              gain_e_per_adu=gain_conf, read_noise_e=rn_conf,
                              names=[Path(r.path).name for r in readers], name=master, **opts)
    finally:
        for r in readers:
            r.close()
    header = _master_header(first.header, first.layout, "master_bias", instrument, product.cards)
    stamp(header, inputs=paths)
    write_frame(Frame(product.data_adu, product.variance_adu2, product.mask, header, unit="adu"),
                master)
    result, check = product.combination, product.check
    rows = [(Path(r.path).name, (r.overscan_fit.info["mean_adu"] if r.overscan_fit else 0.0),
             (r.overscan_fit.info["rms_adu"] if r.overscan_fit else 0.0)) for r in readers]
    meta = {"read_noise_adu": header["RNMEAS"], "read_noise_e_configured_gain": header["RNMEASE"],
            "read_noise_configured_e": rn_conf, "gain_configured_e_per_adu": gain_conf,
            "read_noise_within_tolerance": check.within_tolerance, "tolerance": check.tolerance,
            "pair_read_noise_adu": [float(v) for v in result.info["pair_read_noise_adu"]],
            "n_frames": len(product.used_names), "n_given": len(paths),
            "n_clipped": result.info["n_clipped"],
            "mean_level_adu": result.info["mean_level_adu"], "block_rows": opts["block_rows"],
            "overscan_method": ov_opts["method"]}
    _write_qa_table(rows, ["frame", "overscan_level_adu", "overscan_rms_adu"], meta, qa)
    log.info("master bias %s: %d frames, read noise %.3f ADU = %.3f e- (configured %.3f e-)",
             master, len(product.used_names), result.read_noise_adu, check.measured_e, rn_conf)
    return master


def make_master_flat_file(*, frames, bias, master, qa, instrument, overscan=None, flat=None):
    """Master flat of one setup from raw flats (rule ``master_flat``).

    Parameters
    ----------
    frames : list of str
        Raw flat files of one setup.
    bias : str
        Master bias of their readout mode.
    master : str
        Output frame: PRIMARY = normalised response (canonical), VAR = its
        variance, MASK = UNILLUMINATED and BAD_PIXEL bits; extension LAMP = the
        smooth lamp spectrum divided out. Header: ``NFRAMES``, ``GAINMEAS``
        (e-/ADU, photon transfer; -1 when not measurable), ``GAINOK``,
        ``FLATNORM``.
    qa : str
        ECSV: a row per flat (``kind='frame'``: level, saturated pixels) and
        per gain pair (``kind='pair'``: mean tile signal, gain, tiles); the
        measured and configured gain and the mask counts in the meta.
    instrument : dict
        CCD part of the instrument config.
    overscan, flat : dict
        The ``overscan`` and ``flat`` config sections.
    """
    import numpy as np
    from astropy.io import fits

    from pipeline.core.frames import Frame, write_frame
    from pipeline.core.provenance import stamp

    paths = _as_list(frames)
    if not paths:
        raise CalibrationError(f"{master}: no flat frame given")
    ov_opts = overscan_kwargs(overscan)
    opts = merge_options(flat, FLAT_DEFAULTS, "flat")
    mbias = read_master(bias, kind="bias")
    saturation = instrument.get("saturation_adu")
    readers = []
    try:
        for p in paths:
            reader = RawRows(p, instrument, ov_opts, saturation_adu=saturation)
            orient = reader.layout.orientation
            if orient.canonical_shape(reader.shape) != mbias.shape:
                reader.close()
                raise CalibrationError(
                    f"{p}: trimmed shape {orient.canonical_shape(reader.shape)} (canonical) "
                    f"differs from the master bias {bias} {mbias.shape}; expected the same "
                    "readout mode")
            reader.bias_raw = np.ascontiguousarray(orient.invert(mbias.data))
            readers.append(reader)
        first = readers[0]
        product = master_flat(
            readers, names=[Path(p).name for p in paths], layout=first.layout,
            bias_mask=mbias.mask, bias_read_noise_adu=float(mbias.header.get("RNMEAS", -1)),
            gain_e_per_adu=_configured(first.header, instrument, "gain_e_per_adu",
                                       path=first.path),
            read_noise_e=_configured(first.header, instrument, "read_noise_e", path=first.path),
            name=master, **opts)
    finally:
        for r in readers:
            r.close()
    header = _master_header(first.header, first.layout, "master_flat", instrument, product.cards)
    stamp(header, inputs=paths, calibrations=[bias])
    lamp_hdu = fits.ImageHDU(product.lamp_shape.astype(np.float32), name="LAMP")
    lamp_hdu.header["COMMENT"] = "smooth lamp spectrum divided out, along canonical x"
    write_frame(Frame(product.response, product.variance, product.mask, header, unit=""),
                master, extra_hdus=[lamp_hdu])
    _write_qa_table(product.qa_rows, FLAT_QA_COLUMNS, product.qa_meta, qa)
    log.info("master flat %s: %d frames, gain %.4f e-/ADU (configured %s), %d bad (%d of them "
             "known defects), %d unilluminated pixels", master, len(paths),
             product.info["gain"].measured_e_per_adu, product.qa_meta["gain_configured_e_per_adu"],
             product.info["n_bad"], product.info["n_known_defects"],
             product.info["n_unilluminated"])
    return master


def calibrate_frame_file(*, raw, bias, flat, calibrated, frame_type, instrument, overscan=None,
                         calibration=None, keywords=None):
    """CCD-calibrate one arc, standard or science frame (rule ``calibrate_frame``).

    Parameters
    ----------
    raw : str
        Raw frame (never modified).
    bias, flat : str
        Master bias (its readout mode) and master flat (its setup).
    calibrated : str
        Output frame in electrons, canonical orientation, with variance and mask.
    frame_type : str
        'arc', 'standard' or 'science'; cosmic rays are flagged on the latter two.
    instrument : dict
        CCD part of the instrument config.
    overscan, calibration : dict
        The ``overscan`` and ``calibration`` config sections.
    keywords : dict, optional
        ``instrument.keywords``. The values of the configured raw keywords are
        written under the standard names of :data:`pipeline.ccd.cards.STANDARD_KEYWORDS`
        (OBJECT, EXPTIME, DATE-OBS, AIRMASS, RA, DEC, GRATING, GRTILT, SLITWID,
        FILTER, LAMPS), which are the only names later steps read.

    Notes
    -----
    Which gain and read noise are used, and why, is decided by
    :func:`pipeline.ccd.gain.choose_gain_and_read_noise`; header keywords ``GAINUSED``
    and ``RNUSED`` record what was used, ``GAINSRC``/``RNSRC`` where it came from. The raw
    gain and read-noise cards named in the instrument config are not copied (the frame is
    in electrons).
    """
    from pipeline.core.frames import Frame, write_frame
    from pipeline.core.provenance import stamp

    opts = merge_options(calibration, CALIBRATION_DEFAULTS, "calibration")
    ov_opts = overscan_kwargs(overscan)
    header, raw_adu, layout = read_raw(raw, instrument)
    mbias = read_master(bias, kind="bias")
    mflat = read_master(flat, kind="flat")
    shape = layout.orientation.canonical_shape(layout.data.shape)
    for name, m in (("bias", mbias), ("flat", mflat)):
        if m.shape != shape:
            raise CalibrationError(f"{raw}: trimmed frame {shape} does not match the master "
                                   f"{name} {bias if name == 'bias' else flat} {m.shape}")
    try:
        product = calibrate_raw_frame(
            raw_adu, header, layout, mbias, mflat, frame_type=frame_type, instrument=instrument,
            gain_e_per_adu=_configured(header, instrument, "gain_e_per_adu", path=raw),
            read_noise_e=_configured(header, instrument, "read_noise_e", path=raw),
            keywords=keywords, use_measured_gain=opts["use_measured_gain"],
            use_measured_read_noise=opts["use_measured_read_noise"],
            include_flat_error=opts["include_flat_error"], cosmic_rays=opts["cosmic_rays"],
            overscan_options=ov_opts,
            default_read_noise_tolerance=BIAS_DEFAULTS["read_noise_tolerance"],
            name=f"{calibrated} (master bias {Path(bias).name})")
    except ValueError as exc:
        raise InputFileError(raw, str(exc)) from None
    stamp(product.header, inputs=[raw], calibrations=[bias, flat])
    result = product.frame
    write_frame(Frame(result.data_e, result.variance_e2, result.mask, product.header,
                      unit="electron"), calibrated)
    noise = product.noise
    log.info("calibrated %s (%s): gain %.4f (%s), read noise %.3f e- (%s), %d saturated, "
             "%d cosmic-ray pixels", raw, frame_type, noise.gain_e_per_adu, noise.gain_source,
             noise.read_noise_e, noise.read_noise_source, result.info["n_saturated"],
             result.info["n_cosmic"])
    return calibrated
