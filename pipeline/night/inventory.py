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
from dataclasses import asdict, dataclass, field
from pathlib import Path

from pipeline.core import headers as hdr
from pipeline.core.errors import InputFileError, InputFileWarning
from pipeline.night.screening import pixel_problem, read_row_sample
from pipeline.night.setups import group_setups, setup_value

__all__ = ["FrameRecord", "NightInventory", "take_inventory", "write_night_log_file",
           "frame_id_from_path", "find_files", "FRAME_TYPES"]

FRAME_TYPES = ("bias", "flat", "arc", "standard", "science")
#: the ``inventory`` config section's defaults (config/schema.yaml)
SCREENING_DEFAULTS = {"sample_rows": 16, "max_saturated_fraction": 0.5,
                      "max_nonfinite_fraction": 0.5}
_TARGETS = ("standard", "science")
_EXTENSIONS = (".fits.gz", ".fit.gz", ".fts.gz", ".fits.fz", ".fits", ".fit", ".fts", ".gz", ".fz")


@dataclass(frozen=True)
class FrameRecord:
    """What the inventory knows about one raw file (from its header).

    Attributes
    ----------
    frame_id : str
        Raw file name without extension(s), sanitised to ``[A-Za-z0-9._-]``;
        unique in the night.
    path : str
        Path of the raw file.
    frame_type : str
        'bias', 'flat', 'arc', 'standard', 'science', 'ignored' or 'unknown'.
    setup : str
        Setup id built from ``instrument.setup_keywords`` ('' for biases and
        when not known).
    readout : str
        Readout-mode id from ``instrument.readout_keywords`` ('' when not known).
    object : str
        Object name ('' when missing).
    exptime_s : float, s
        Exposure time (nan when missing).
    date_obs : str
        DATE-OBS as written in the header ('' when missing).
    mjd : float, d
        Modified Julian Date (UTC) of the start of exposure (nan when missing).
    status : str
        'ok', 'ignored' or 'rejected'.
    reason : str
        '' for ok; why the file was ignored or rejected otherwise.
    airmass : float
        nan when missing.
    lamps : str
        Arc lamps switched on ('' when missing).
    shape : tuple of int
        ``(ny, nx)`` of the raw pixel array; ``()`` when unreadable.
    binning : tuple of int
        Binning along FITS axes 1 and 2; ``()`` when not known.
    id_values : tuple
        ``(readout values, setup values)``: keyword -> header value as read, from which
        :func:`assign_ids` groups the night (``()`` when not read; setup values None for
        biases).
    """

    frame_id: str
    path: str
    frame_type: str
    setup: str
    readout: str
    object: str
    exptime_s: float
    date_obs: str
    mjd: float
    status: str
    reason: str
    airmass: float = math.nan
    lamps: str = ""
    shape: tuple = ()
    binning: tuple = ()
    id_values: tuple = field(default=(), compare=False, repr=False)

    @property
    def ok(self):
        return self.status == "ok"


def _replace(record, **changes):
    fields_ = asdict(record)
    fields_.update(changes)
    return FrameRecord(**fields_)


def _reject(record, reason, status="rejected"):
    return _replace(record, status=status, reason=reason)


@dataclass(frozen=True)
class NightInventory:
    """All frames of a night with the calibration associations.

    Attributes
    ----------
    records : tuple of FrameRecord
        One record per raw file, sorted by frame id.
    """

    records: tuple

    def __post_init__(self):
        index = {}
        for rec in self.records:
            if rec.frame_id in index:
                raise ValueError(f"frame id {rec.frame_id!r} occurs twice in the inventory")
            index[rec.frame_id] = rec
        object.__setattr__(self, "_index", index)

    # -- selections -----------------------------------------------------------------
    def frames(self, frame_type=None, *, setup=None, status="ok"):
        """Records of one frame type (all when None), setup and status (None = any)."""
        return [r for r in self.records
                if (frame_type is None or r.frame_type == frame_type)
                and (setup is None or r.setup == setup)
                and (status is None or r.status == status)]

    def record(self, frame_id):
        """The record of ``frame_id``.

        Raises
        ------
        KeyError
            When the night has no frame of that id.
        """
        try:
            return self._index[frame_id]
        except KeyError:
            raise KeyError(f"no frame {frame_id!r} in the night inventory") from None

    def setups(self):
        """Setups that have usable standard or science frames (sorted)."""
        return sorted({r.setup for r in self.records if r.ok and r.frame_type in _TARGETS})

    def readouts(self):
        """Readout modes that have usable biases (sorted)."""
        return sorted({r.readout for r in self.frames("bias")})

    def calibrated_frames(self):
        """Usable arcs, standards and science frames of the setups in :meth:`setups`."""
        used = set(self.setups())
        return [r for r in self.records if r.ok and r.setup in used
                and r.frame_type in ("arc", "standard", "science")]

    def setup_readout(self, setup):
        """Readout id of the frames of ``setup`` (the one of its flats)."""
        for rec in self.flats_for(setup) + self.frames(None, setup=setup):
            if rec.readout:
                return rec.readout
        raise KeyError(f"setup {setup!r} has no usable frame in the night inventory")

    def bias_for(self, frame_id):
        """Readout id whose master bias calibrates ``frame_id``.

        Raises
        ------
        KeyError
            When the frame is unknown or its readout mode has no usable bias.
        """
        rec = self.record(frame_id)
        if rec.readout not in self.readouts():
            raise KeyError(f"frame {frame_id!r}: readout mode {rec.readout!r} has no usable bias")
        return rec.readout

    def flats_for(self, setup):
        """Usable flats of ``setup``."""
        return self.frames("flat", setup=setup)

    def arcs_for(self, setup):
        """Usable arcs of ``setup``."""
        return self.frames("arc", setup=setup)

    def standards_for(self, setup):
        """Usable standard-star frames of ``setup``."""
        return self.frames("standard", setup=setup)

    def science_for(self, setup):
        """Usable science frames of ``setup``."""
        return self.frames("science", setup=setup)

    def nearest_arc(self, frame_id):
        """The arc of the same setup nearest in time to ``frame_id`` (earlier on a tie).

        Raises
        ------
        KeyError
            When the frame is unknown or its setup has no usable arc.
        """
        rec = self.record(frame_id)
        arcs = self.arcs_for(rec.setup)
        if not arcs:
            raise KeyError(f"frame {frame_id!r}: setup {rec.setup!r} has no usable arc")
        if rec.frame_type == "arc":
            return rec

        def distance(arc):
            gap = abs(arc.mjd - rec.mjd)
            return (gap if math.isfinite(gap) else math.inf,
                    arc.mjd if math.isfinite(arc.mjd) else math.inf, arc.frame_id)

        return min(arcs, key=distance)

    def problems(self):
        """One line per ignored or rejected file: ``'<path>: <status>: <reason>'``.

        The same text as the :class:`~pipeline.core.errors.InputFileWarning` of each;
        for printing where Python warnings are not shown (Snakemake hides the
        warnings raised while it parses the Snakefile).
        """
        return [f"{r.path}: {r.status}: {r.reason}" for r in self.records if r.status != "ok"]

    def to_table(self):
        """The night log as an astropy Table (one row per file)."""
        from astropy.table import Table

        names = ["frame_id", "path", "frame_type", "setup", "readout", "object", "exptime_s",
                 "date_obs", "mjd", "airmass", "lamps", "shape", "status", "reason",
                 "bias", "nearest_arc"]
        rows = []
        for r in self.records:
            bias = arc = ""
            if r.ok and r.frame_type != "bias":
                try:
                    bias = self.bias_for(r.frame_id)
                except KeyError:
                    pass
                if r.frame_type in _TARGETS:
                    try:
                        arc = self.nearest_arc(r.frame_id).frame_id
                    except KeyError:
                        pass
            rows.append((r.frame_id, r.path, r.frame_type, r.setup, r.readout, r.object,
                         r.exptime_s, r.date_obs, r.mjd, r.airmass, r.lamps,
                         "x".join(str(n) for n in r.shape), r.status, r.reason, bias, arc))
        table = Table(rows=rows or None, names=names,
                      dtype=[str, str, str, str, str, str, float, str, float, float, str,
                             str, str, str, str, str])
        table["exptime_s"].unit = "s"
        table["mjd"].unit = "d"
        table.meta["comments"] = [
            "Night log: one row per raw file; status ok / ignored / rejected with the reason.",
            "shape is ny x nx of the raw pixels; bias is the readout id of the master bias;",
            "nearest_arc is the arc of the same setup nearest in time (standards, science).",
        ]
        return table


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
        out = [_replace(rec, **{name: ident}) for rec, ident in zip(out, groups.ids)]
        notes.extend(groups.notes)
    return out, notes


def _inventory_of(paths, frame_ids, instrument, screening=None):
    records = [_read_record(p, fid, instrument, screening) for p, fid in zip(paths, frame_ids)]
    records, notes = assign_ids(records, instrument)
    for note in notes:
        warnings.warn(f"setup grouping: {note}", InputFileWarning, stacklevel=3)
    records = _check_associations(_check_shapes(records))
    records.sort(key=lambda r: r.frame_id)
    return NightInventory(tuple(records))


def take_inventory(raw_dir, instrument, screening=None):
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
    inventory = _inventory_of(paths, _unique_ids(paths), instrument, screening)
    for line in inventory.problems():
        warnings.warn(line, InputFileWarning, stacklevel=2)
    return inventory


def write_night_log_file(*, raw_frames, night_log, raw_dir, instrument, screening=None):
    """Write the night log (ECSV, one row per raw file) of ``raw_dir``.

    Parameters
    ----------
    raw_frames : list of str
        The raw files the rule depends on (so a changed file reruns it); files
        among them that the folder scan misses are inventoried too.
    night_log : str
        Output ECSV path.
    raw_dir : str
        Folder of the night's raw frames.
    instrument : dict
        The ``instrument`` config section.
    screening : dict or None
        The ``inventory`` config section (see :func:`take_inventory`).
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", InputFileWarning)
        inventory = take_inventory(raw_dir, instrument, screening)
    import logging
    log = logging.getLogger("pipeline.night_log")
    for w in caught:
        log.warning("%s", w.message)
    known = {Path(r.path).resolve() for r in inventory.records}
    extra = [p for p in (raw_frames if isinstance(raw_frames, (list, tuple)) else [raw_frames])
             if Path(p).resolve() not in known]
    if extra:
        ids = {r.frame_id for r in inventory.records}
        paths = [Path(r.path) for r in inventory.records]
        frame_ids = [r.frame_id for r in inventory.records]
        for path in extra:
            fid = frame_id_from_path(path)
            while fid in ids:
                fid += "-x"
            ids.add(fid)
            paths.append(Path(path))
            frame_ids.append(fid)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", InputFileWarning)
            inventory = _inventory_of(paths, frame_ids, instrument, screening)
    table = inventory.to_table()
    Path(night_log).parent.mkdir(parents=True, exist_ok=True)
    table.write(night_log, format="ascii.ecsv", overwrite=True)
    counts = Counter(r.status for r in inventory.records)
    log.info("night log %s: %d files (%s)", night_log, len(inventory.records),
             ", ".join(f"{n} {s}" for s, n in sorted(counts.items())))
    return night_log

