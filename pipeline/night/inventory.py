"""Inventory of one night: classify raw frames, group them, associate calibrations.

The inventory reads headers (see :mod:`pipeline.core.headers`) and a few pixel
rows per frame, so the Snakefile can take it at parse time. A bad file never stops the night: it is
kept in the inventory with ``status='rejected'`` and the reason, and a one-line
:class:`~pipeline.core.errors.InputFileWarning` names the file and the reason.

Rules applied, in order:

1. Each file must open as FITS with a complete 2-D pixel extension and carry
   the frame-type keyword; its value must be one of the configured frame types
   (values listed under ``frame_types.ignore`` give ``status='ignored'``).
2. Required keywords: readout keywords for every frame; setup keywords for
   flats, arcs, standards and science frames; exposure time for all but
   biases; DATE-OBS for arcs, standards and science frames; OBJECT for
   standards and science frames; gain, read noise and sections whenever they
   are configured as header keywords without a fallback value.
3. Shape: within a readout mode (biases) or a setup (all others), every
   frame must have the most common shape, and the data and overscan sections
   must lie inside it.
4. Pixels: a few evenly spaced rows of the data section are read; a frame that
   is not data (mostly NaN, all zero, one constant value, saturated nearly
   everywhere; :mod:`pipeline.night.screening`) is rejected.
5. Associations: every non-bias frame needs usable biases of its readout mode,
   of its shape; standard and science frames also need flats and arcs of their
   setup.

Setups are grouped over the whole night by matching each setup keyword's values
within a tolerance (``instrument.setup_tolerances``; text with case and blanks
normalised), never by rounding: see :mod:`pipeline.night.setups`. Setup ids join
the keywords' cluster values with ``_`` (e.g. ``G600_t08.93_s1.2_2x2_NONE``): the
grating tilt is written ``t`` + two decimals (of the cluster median), the slit
width ``s`` + up to two decimals, binning as ``2x2``, other numbers up to 3
decimals, text upper case with anything but letters, digits, ``.`` and ``-``
replaced by ``-``. Readout ids are built the same way (``2x2``).
"""

import math
import re
import warnings
from collections import Counter
from pathlib import Path

from pipeline.core import headers as hdr
from pipeline.core.errors import InputFileError, InputFileWarning
from pipeline.night.records import FRAME_TYPES, TARGET_TYPES, FrameRecord, NightInventory, \
    replace_record
from pipeline.night.screening import pixel_problem, read_row_sample
from pipeline.night.setups import group_setups, setup_value

__all__ = ["FrameRecord", "NightInventory", "take_inventory", "assign_ids", "frame_id_from_path",
           "find_files", "inventory_of", "FRAME_TYPES", "SCREENING_DEFAULTS"]

#: the ``inventory`` config section's defaults (config/schema.yaml)
SCREENING_DEFAULTS = {"sample_rows": 16, "max_saturated_fraction": 0.5,
                      "max_nonfinite_fraction": 0.5}
_TARGETS = TARGET_TYPES
_EXTENSIONS = (".fits.gz", ".fit.gz", ".fts.gz", ".fits.fz", ".fits", ".fit", ".fts", ".gz", ".fz")


def _reject(record, reason, status="rejected"):
    return replace_record(record, status=status, reason=reason)


# -- id helpers ---------------------------------------------------------------------
def _sanitise(text, *, allow_underscore=True):
    pattern = r"[^A-Za-z0-9._-]+" if allow_underscore else r"[^A-Za-z0-9.-]+"
    cleaned = re.sub(pattern, "-", str(text).strip()).strip("-")
    return cleaned or "none"


def frame_id_from_path(path):
    """Frame id of a raw file: its name without FITS extension(s), sanitised."""
    name = Path(path).name
    lower = name.lower()
    for ext in _EXTENSIONS:
        if lower.endswith(ext) and len(name) > len(ext):
            name = name[: -len(ext)]
            break
    return _sanitise(name)


def _id_values(header, keywords, roles, *, path):
    """The raw values of the setup/readout keywords of one frame (checked, not yet grouped)."""
    values = {}
    for keyword in keywords:
        value = header.get(keyword)
        if value is None or (isinstance(value, str) and not value.strip()):
            raise InputFileError(path, f"keyword {keyword} missing; expected a value "
                                 "(it defines the setup/readout mode in the config)")
        try:
            setup_value(keyword, value, roles.get(keyword))
        except ValueError as exc:
            raise InputFileError(path, str(exc)) from None
        values[keyword] = value
    return values


def _time_of_day(header, keywords):
    """The separate start-time value (``keywords.time_obs``, else UT, else TIME-OBS)."""
    if keywords.get("time_obs"):
        return header.get(keywords["time_obs"])
    return header.get("UT") or header.get("TIME-OBS")


def _frame_type(header, instrument, *, path):
    keyword = instrument["frame_type_keyword"]
    value = header.get(keyword)
    if value is None or not str(value).strip():
        raise InputFileError(path, f"keyword {keyword} missing; expected the frame type "
                             "(add it to the header or set instrument.frame_type_keyword)")
    text = str(value).strip().upper()
    types = instrument["frame_types"]
    for frame_type in FRAME_TYPES:
        if text in {v.strip().upper() for v in types.get(frame_type, [])}:
            return frame_type, text
    if text in {v.strip().upper() for v in types.get("ignore", [])}:
        return "ignored", text
    return "unknown", text


# -- reading one file ---------------------------------------------------------------
def _read_record(path, frame_id, instrument, screening=None):
    """A record for one file; rejection reasons are recorded, never raised."""
    kw = instrument.get("keywords", {})
    roles = {v: k for k, v in kw.items()}
    base = dict(frame_id=frame_id, path=str(path), frame_type="unknown", setup="", readout="",
                object="", exptime_s=math.nan, date_obs="", mjd=math.nan, status="ok",
                reason="")
    truncated = None
    try:
        header = hdr.read_raw_header(path, extension=instrument.get("pixel_extension", 0))
    except InputFileError as exc:
        header = getattr(exc, "header", None)
        if header is None:
            return FrameRecord(**{**base, "status": "rejected", "reason": exc.problem})
        truncated = exc.problem   # header complete, pixels cut: classify, then reject
    shape = hdr.raw_shape(header)
    base["shape"] = shape
    try:
        frame_type, type_value = _frame_type(header, instrument, path=path)
    except InputFileError as exc:
        return FrameRecord(**{**base, "status": "rejected", "reason": exc.problem})
    base["frame_type"] = frame_type
    if truncated:
        base["object"] = hdr.header_str(header, kw.get("object"), default="")
        base["date_obs"] = hdr.header_str(header, kw.get("date_obs"), default="")
        return FrameRecord(**{**base, "status": "rejected", "reason": truncated})
    base["object"] = hdr.header_str(header, kw.get("object"), default="")
    base["date_obs"] = hdr.header_str(header, kw.get("date_obs"), default="")
    base["lamps"] = hdr.header_str(header, kw.get("lamps"), default="")
    base["ra"] = hdr.header_str(header, kw.get("ra_deg"), default="")
    base["dec"] = hdr.header_str(header, kw.get("dec_deg"), default="")
    if kw.get("airmass") and header.get(kw["airmass"]) is not None:
        try:
            base["airmass"] = hdr.header_float(header, kw["airmass"], path=path)
        except InputFileError:
            pass
    if kw.get("binning") and header.get(kw["binning"]) is not None:
        try:
            base["binning"] = hdr.parse_binning(header[kw["binning"]], name=kw["binning"])
        except ValueError:
            pass
    if frame_type == "ignored":
        return FrameRecord(**{**base, "status": "ignored",
                              "reason": f"{instrument['frame_type_keyword']} = {type_value!r} "
                                        "is listed under instrument.frame_types.ignore"})
    if frame_type == "unknown":
        known = sorted({v for t in FRAME_TYPES for v in instrument["frame_types"].get(t, [])})
        return FrameRecord(**{**base, "status": "rejected",
                              "reason": f"{instrument['frame_type_keyword']} = {type_value!r} "
                                        f"is not a known frame type; expected one of {known} "
                                        "(or list it under instrument.frame_types.ignore)"})
    try:
        readout_values = _id_values(header, instrument.get("readout_keywords", []), roles,
                                    path=path)
        setup_values = None
        if frame_type != "bias":
            setup_values = _id_values(header, instrument.get("setup_keywords", []), roles,
                                      path=path)
        base["id_values"] = (readout_values, setup_values)
        if frame_type != "bias":
            base["exptime_s"] = hdr.header_float(header, kw.get("exposure_time_s", "EXPTIME"),
                                                 path=path)
            if base["exptime_s"] < 0:
                raise InputFileError(path, f"keyword {kw.get('exposure_time_s')} = "
                                     f"{base['exptime_s']}; expected seconds >= 0")
        elif kw.get("exposure_time_s") and header.get(kw["exposure_time_s"]) is not None:
            base["exptime_s"] = hdr.header_float(header, kw["exposure_time_s"], path=path)
        if base["date_obs"]:
            base["mjd"] = hdr.date_obs_to_mjd(base["date_obs"], path=path,
                                              keyword=kw.get("date_obs", "DATE-OBS"),
                                              time_text=_time_of_day(header, kw))
        elif frame_type in ("arc", "standard", "science"):
            hdr.header_str(header, kw.get("date_obs", "DATE-OBS"), path=path)  # raises
        if frame_type in _TARGETS and not base["object"]:
            hdr.header_str(header, kw.get("object", "OBJECT"), path=path)  # raises
        hdr.keyword_or_value(header, instrument.get("gain_e_per_adu"), path=path,
                             name="gain_e_per_adu")
        hdr.keyword_or_value(header, instrument.get("read_noise_e"), path=path,
                             name="read_noise_e")
        sections = instrument.get("sections", {})
        for name in ("data", "overscan"):
            section = hdr.section_from_header(header, sections.get(name), path=path, name=name)
            if not section.fits_in(shape):
                raise InputFileError(path, f"{name} section {section} lies outside the "
                                     f"{shape[1]} x {shape[0]} pixel array (NAXIS1 x NAXIS2)")
            if name == "data":
                data_section = section
        _screen_pixels(path, instrument, data_section, screening)
    except InputFileError as exc:
        return FrameRecord(**{**base, "status": "rejected", "reason": exc.problem})
    return FrameRecord(**base)


def _screen_pixels(path, instrument, data_section, screening):
    """Raise InputFileError when a sample of the frame's rows shows it is not data."""
    options = {**SCREENING_DEFAULTS, **(screening or {})}
    try:
        sample = read_row_sample(path, extension=instrument.get("pixel_extension", 0),
                                 n_rows=options["sample_rows"], section=data_section)
    except Exception as exc:  # astropy raises many types on damaged data units
        raise InputFileError(path, f"pixels unreadable ({type(exc).__name__}: {exc}); "
                             "expected a FITS image (copy the file again from the "
                             "telescope)") from None
    problem = pixel_problem(sample, saturation_adu=instrument.get("saturation_adu"),
                            max_saturated_fraction=options["max_saturated_fraction"],
                            max_nonfinite_fraction=options["max_nonfinite_fraction"])
    if problem:
        raise InputFileError(path, f"{problem}, in {len(sample)} rows of the data section; "
                             "the frame is left out of the night (look at it, and remove it "
                             "from raw_dir if it is of no use)")


def _unique_ids(paths):
    seen = Counter()
    ids = []
    for path in paths:
        fid = frame_id_from_path(path)
        seen[fid] += 1
        ids.append(fid if seen[fid] == 1 else f"{fid}-{seen[fid]}")
    return ids


def find_files(raw_dir, patterns):
    """Files of ``raw_dir`` matching any of the glob ``patterns`` (sorted, no folders)."""
    raw_dir = Path(raw_dir)
    found = set()
    for pattern in patterns:
        found.update(p for p in raw_dir.glob(pattern) if p.is_file())
    return sorted(found)


def _check_shapes(records):
    """Reject frames whose shape differs from the most common one of their group."""
    groups = {}
    for i, rec in enumerate(records):
        if rec.ok:
            key = ("readout", rec.readout) if rec.frame_type == "bias" else ("setup", rec.setup)
            groups.setdefault(key, []).append(i)
    out = list(records)
    for (kind, name), members in groups.items():
        counts = Counter(records[i].shape for i in members)
        # most common shape; ties broken by the largest count then the larger array
        shape, _ = max(counts.items(), key=lambda item: (item[1], item[0]))
        for i in members:
            if records[i].shape != shape:
                got = records[i].shape
                out[i] = _reject(records[i], f"shape {got[1]} x {got[0]} (NAXIS1 x NAXIS2) "
                                 f"differs from the {shape[1]} x {shape[0]} of the other "
                                 f"frames of {kind} {name}")
    return out


def _check_associations(records):
    """Reject frames whose calibrations are missing."""
    bias_shapes = {r.readout: r.shape for r in records if r.ok and r.frame_type == "bias"}
    out = []
    for rec in records:
        if rec.ok and rec.frame_type != "bias":
            if rec.readout not in bias_shapes:
                rec = _reject(rec, f"no usable bias for readout mode {rec.readout}")
            elif rec.shape != bias_shapes[rec.readout]:
                want = bias_shapes[rec.readout]
                rec = _reject(rec, f"shape {rec.shape[1]} x {rec.shape[0]} (NAXIS1 x NAXIS2) "
                              f"differs from the {want[1]} x {want[0]} of the biases of "
                              f"readout mode {rec.readout}")
        out.append(rec)
    flat_setups = {r.setup for r in out if r.ok and r.frame_type == "flat"}
    arc_setups = {r.setup for r in out if r.ok and r.frame_type == "arc"}
    final = []
    for rec in out:
        if rec.ok and rec.frame_type in _TARGETS:
            missing = [name for name, have in (("flats", flat_setups), ("arcs", arc_setups))
                       if rec.setup not in have]
            if missing:
                rec = _reject(rec, f"no usable {' or '.join(missing)} for setup {rec.setup}")
        final.append(rec)
    return final


def assign_ids(records, instrument):
    """Records with their setup and readout ids, grouped over the whole night.

    Values of each setup/readout keyword are matched within
    ``instrument.setup_tolerances`` (see :mod:`pipeline.night.setups`); frames
    without values keep ''. Returns the records and the notes of chained clusters.
    """
    kw = instrument.get("keywords", {})
    roles = {v: k for k, v in kw.items()}
    tolerances = instrument.get("setup_tolerances") or {}
    out = list(records)
    notes = []
    for index, name, keywords in ((0, "readout", instrument.get("readout_keywords", [])),
                                  (1, "setup", instrument.get("setup_keywords", []))):
        rows = [r.id_values[index] if r.id_values else None for r in records]
        groups = group_setups(rows, keywords, roles=roles, tolerances=tolerances)
        out = [replace_record(rec, **{name: ident}) for rec, ident in zip(out, groups.ids)]
        notes.extend(groups.notes)
    return out, notes


def inventory_of(paths, frame_ids, instrument, screening=None):
    """The inventory of the given files with the given frame ids (see :func:`take_inventory`)."""
    records = [_read_record(p, fid, instrument, screening) for p, fid in zip(paths, frame_ids)]
    records, notes = assign_ids(records, instrument)
    for note in notes:
        warnings.warn(f"setup grouping: {note}", InputFileWarning, stacklevel=3)
    records = _check_associations(_check_shapes(records))
    records.sort(key=lambda r: r.frame_id)
    return NightInventory(tuple(records))


def take_inventory(raw_dir, instrument, screening=None, *, also=()):
    """Inventory a night's raw folder from the headers (and a few pixel rows per frame).

    Parameters
    ----------
    raw_dir : str or Path
        Folder of raw frames (read only).
    instrument : dict
        The ``instrument`` config section (see config/schema.yaml).
    screening : dict or None
        The ``inventory`` config section (``sample_rows``,
        ``max_saturated_fraction``, ``max_nonfinite_fraction``; defaults
        :data:`SCREENING_DEFAULTS`): frames that are not data are rejected
        (see :mod:`pipeline.night.screening`).
    also : list of str
        Raw files to inventory too when the folder scan misses them (the files a
        workflow rule depends on); their ids get ``-x`` appended when taken.

    Returns
    -------
    NightInventory
        One record per file matching ``instrument.file_patterns``. Never raises
        for a bad file: it is rejected with its reason, and an
        :class:`~pipeline.core.errors.InputFileWarning` names it.

    Raises
    ------
    InputFileError
        Only when ``raw_dir`` is not a folder.
    """
    raw_dir = Path(raw_dir)
    if not raw_dir.is_dir():
        raise InputFileError(raw_dir, "raw_dir is not a folder; expected the folder of the "
                             "night's raw FITS frames (set raw_dir in the config)")
    paths = find_files(raw_dir, instrument.get("file_patterns", ["*.fits", "*.fit", "*.fits.gz"]))
    frame_ids = _unique_ids(paths)
    known = {p.resolve() for p in paths}
    taken = set(frame_ids)
    for path in ([also] if isinstance(also, (str, Path)) else list(also)):
        if Path(path).resolve() in known:
            continue
        fid = frame_id_from_path(path)
        while fid in taken:
            fid += "-x"
        taken.add(fid)
        known.add(Path(path).resolve())
        paths.append(Path(path))
        frame_ids.append(fid)
    inventory = inventory_of(paths, frame_ids, instrument, screening)
    for line in inventory.problems():
        warnings.warn(line, InputFileWarning, stacklevel=2)
    return inventory
