"""Typed look-ups in raw FITS headers whose errors name the file and keyword.

Everything here reads headers only (never pixel values), so the inventory of a
night stays fast. Each look-up raises :class:`pipeline.core.errors.InputFileError`
naming the file, the keyword, what was expected and how to fix it.

Sections follow the FITS convention ``[x1:x2,y1:y2]``: 1-based, inclusive,
``x`` along FITS axis 1 (numpy axis 1 of the raw array), ``y`` along FITS
axis 2 (numpy axis 0).
"""

import gzip
import math
import os
import re
import warnings
from dataclasses import dataclass
from pathlib import Path

from astropy.io import fits
from astropy.utils.exceptions import AstropyUserWarning

from pipeline.core.errors import InputFileError

__all__ = [
    "Section", "parse_section", "parse_binning", "read_raw_header", "raw_shape",
    "header_str", "header_float", "keyword_or_value", "section_from_header",
    "date_obs_to_mjd", "combined_header", "is_raw_geometry_keyword",
]

_SECTION_RE = re.compile(r"^\s*\[\s*(\d+)\s*:\s*(\d+)\s*,\s*(\d+)\s*:\s*(\d+)\s*\]\s*$")


@dataclass(frozen=True)
class Section:
    """A rectangular FITS section, 1-based and inclusive.

    Parameters
    ----------
    x1, x2 : int
        First and last pixel along FITS axis 1 (numpy axis 1), 1-based inclusive.
    y1, y2 : int
        First and last pixel along FITS axis 2 (numpy axis 0), 1-based inclusive.

    Examples
    --------
    >>> s = parse_section("[1:2048,1:4096]")
    >>> s.slices
    (slice(0, 4096, None), slice(0, 2048, None))
    """

    x1: int
    x2: int
    y1: int
    y2: int

    def __post_init__(self):
        if not (1 <= self.x1 <= self.x2 and 1 <= self.y1 <= self.y2):
            raise ValueError(
                f"section {self} must have 1 <= x1 <= x2 and 1 <= y1 <= y2 (1-based inclusive)")

    @property
    def slices(self):
        """``(rows, columns)`` numpy slices of the section in the raw array."""
        return (slice(self.y1 - 1, self.y2), slice(self.x1 - 1, self.x2))

    @property
    def shape(self):
        """``(ny, nx)`` of the section."""
        return (self.y2 - self.y1 + 1, self.x2 - self.x1 + 1)

    def fits_in(self, shape):
        """Whether the section lies inside an array of numpy ``shape`` (ny, nx)."""
        ny, nx = shape
        return self.x2 <= nx and self.y2 <= ny

    def __str__(self):
        return f"[{self.x1}:{self.x2},{self.y1}:{self.y2}]"


def parse_section(text, *, name="section"):
    """Parse a FITS-style section string ``[x1:x2,y1:y2]``.

    Parameters
    ----------
    text : str
        The section, 1-based inclusive, e.g. ``'[1:2048,1:4096]'``.
    name : str
        Name used in the error message (keyword or config key).

    Returns
    -------
    Section

    Raises
    ------
    ValueError
        When ``text`` is not of the form ``[x1:x2,y1:y2]`` with ``x1 <= x2``, ``y1 <= y2``.
    """
    match = _SECTION_RE.match(str(text))
    if not match:
        raise ValueError(f"`{name}` must be a FITS section '[x1:x2,y1:y2]' "
                         f"(1-based inclusive), got {text!r}")
    x1, x2, y1, y2 = (int(v) for v in match.groups())
    try:
        return Section(x1, x2, y1, y2)
    except ValueError as exc:
        raise ValueError(f"`{name}`: {exc}") from None


def parse_binning(text, *, name="binning"):
    """Parse a binning value such as ``'2 2'``, ``'2x2'`` or ``'2,2'``.

    Returns
    -------
    (int, int)
        Binning along FITS axis 1 and FITS axis 2.

    Raises
    ------
    ValueError
        When the value does not hold one or two positive integers.
    """
    parts = [p for p in re.split(r"[\s,xX*]+", str(text).strip()) if p]
    try:
        values = [int(p) for p in parts]
    except ValueError:
        values = []
    if len(values) == 1:
        values = values * 2
    if len(values) != 2 or min(values) < 1:
        raise ValueError(f"`{name}` must be two positive integers like '2 2', got {text!r}")
    return values[0], values[1]


def _gzip_length(path):
    with gzip.open(path, "rb") as stream:
        size = 0
        while True:
            chunk = stream.read(1 << 22)
            if not chunk:
                return size
            size += len(chunk)


def _hdu_by_name_or_index(hdul, extension):
    if isinstance(extension, int) or (isinstance(extension, str) and extension.isdigit()):
        index = int(extension)
        return index, hdul[index]
    for index, hdu in enumerate(hdul):
        if hdu.name.upper() == str(extension).upper():
            return index, hdu
    raise KeyError(extension)


def combined_header(primary, extension_header):
    """Primary-header keywords overridden by those of the pixel extension.

    Structural keywords (``SIMPLE``, ``XTENSION``, ``NAXISn``, ...) come from
    the extension.
    """
    if primary is extension_header:
        return extension_header.copy()
    header = fits.Header()
    skip = {"SIMPLE", "BITPIX", "NAXIS", "EXTEND", "NAXIS1", "NAXIS2", "PCOUNT", "GCOUNT",
            "XTENSION", "EXTNAME", "BZERO", "BSCALE", "CHECKSUM", "DATASUM"}
    for card in primary.cards:
        if card.keyword not in skip and card.keyword not in ("COMMENT", "HISTORY", ""):
            header[card.keyword] = (card.value, card.comment)
    for card in extension_header.cards:
        if card.keyword in ("COMMENT", "HISTORY", ""):
            continue
        header[card.keyword] = (card.value, card.comment)
    return header


def read_raw_header(path, *, extension=0, check_size=True):
    """Read the header of a raw frame's pixel extension, without its pixels.

    Keywords of the primary header are included (the extension's own values
    win), so frame-type and setup keywords may live in either.

    Parameters
    ----------
    path : str or Path
        Raw FITS file (``.gz`` allowed).
    extension : int or str
        HDU index or EXTNAME of the pixel extension.
    check_size : bool
        Compare the file length with the size the header announces; a shorter
        file is reported as truncated.

    Returns
    -------
    astropy.io.fits.Header

    Raises
    ------
    InputFileError
        When the file is not FITS, is truncated, lacks the extension or its
        pixels are not a 2-D image. For a truncated file the error's
        ``header`` attribute holds the (complete) header that was read.
    """
    path = Path(path)
    try:
        with warnings.catch_warnings():
            # astropy warns about short files itself; the size check below says it once
            warnings.simplefilter("ignore", AstropyUserWarning)
            with fits.open(path, memmap=False, lazy_load_hdus=True) as hdul:
                try:
                    index, hdu = _hdu_by_name_or_index(hdul, extension)
                except (KeyError, IndexError):
                    raise InputFileError(
                        path, f"HDU {extension!r} missing; expected the raw pixels there "
                        "(set instrument.pixel_extension in the config)") from None
                header = hdu.header
                primary = hdul[0].header
                info = hdul.fileinfo(index)
    except InputFileError:
        raise
    except Exception as exc:  # astropy raises OSError, ValueError, TypeError... on junk
        detail = str(exc).split(". ")[0].splitlines()[0] if str(exc) else "no detail"
        raise InputFileError(path, f"not a readable FITS file ({type(exc).__name__}: "
                             f"{detail}); expected a FITS image") from None
    if header.get("NAXIS", 0) != 2:
        raise InputFileError(path, f"HDU {extension!r}: NAXIS = {header.get('NAXIS')}; "
                             "expected a 2-D image")
    combined = combined_header(primary, header)
    needed = int(info["datLoc"]) + abs(int(header["BITPIX"])) // 8 * int(header["NAXIS1"]) \
        * int(header["NAXIS2"])
    truncated_error = None
    if check_size:
        actual = _gzip_length(path) if path.suffix.lower() == ".gz" else os.path.getsize(path)
        if actual < needed:
            truncated_error = InputFileError(
                path, f"truncated: {actual} bytes but the header of HDU {extension!r} needs "
                f"{needed}; expected a complete file (copy it again from the telescope)")
            truncated_error.header = combined
            raise truncated_error
    return combined


def raw_shape(header):
    """``(ny, nx)`` numpy shape announced by a header (``NAXIS2``, ``NAXIS1``)."""
    return (int(header["NAXIS2"]), int(header["NAXIS1"]))


def header_str(header, keyword, *, path="<header>", default=None):
    """A header value as a stripped string.

    Raises
    ------
    InputFileError
        When the keyword is missing (or empty) and no ``default`` is given.
    """
    value = header.get(keyword) if keyword else None
    if value is None or (isinstance(value, str) and not value.strip()):
        if default is not None:
            return default
        raise InputFileError(path, f"keyword {keyword} missing; expected a text value "
                             "(add it to the header or map another keyword in the config)")
    return str(value).strip()


def header_float(header, keyword, *, path="<header>", default=None, positive=False):
    """A header value as a float.

    Raises
    ------
    InputFileError
        When the keyword is missing and no ``default`` is given, when the value
        is not a number, or (``positive=True``) not > 0.
    """
    value = header.get(keyword) if keyword else None
    if value is None or (isinstance(value, str) and not value.strip()):
        if default is not None:
            return float(default)
        raise InputFileError(path, f"keyword {keyword} missing; expected a number "
                             "(add it to the header or map another keyword in the config)")
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise InputFileError(path, f"keyword {keyword} = {value!r}; expected a number") from None
    if not math.isfinite(number) or (positive and number <= 0):
        raise InputFileError(path, f"keyword {keyword} = {value!r}; expected a finite number"
                             + (" > 0" if positive else ""))
    return number


def keyword_or_value(header, spec, *, path="<header>", name="value", positive=True):
    """A number from a header keyword, or the configured value when it is absent.

    Parameters
    ----------
    spec : dict
        ``{'keyword': str or None, 'value': float or None}`` (the config form);
        the keyword wins when present in the header.
    name : str
        Config key named in the error message.

    Raises
    ------
    InputFileError
        When neither the keyword nor a value is available, or the value is bad.
    """
    keyword = (spec or {}).get("keyword")
    value = (spec or {}).get("value")
    if keyword and header.get(keyword) is not None:
        return header_float(header, keyword, path=path, positive=positive)
    if value is not None:
        return float(value)
    raise InputFileError(path, f"{name}: keyword {keyword} missing and no value configured; "
                         f"expected a number (add {keyword} to the header or set "
                         f"instrument.{name}.value)")


def section_from_header(header, spec, *, path="<header>", name="section"):
    """A :class:`Section` from a header keyword, or the configured value.

    Raises
    ------
    InputFileError
        When neither is available or the text is not a valid section.
    """
    keyword = (spec or {}).get("keyword")
    value = (spec or {}).get("value")
    text = None
    source = None
    if keyword and header.get(keyword) is not None:
        text, source = header[keyword], f"keyword {keyword}"
    elif value is not None:
        text, source = value, f"instrument.sections.{name}.value"
    if text is None:
        raise InputFileError(path, f"{name} section: keyword {keyword} missing and no value "
                             f"configured; expected '[x1:x2,y1:y2]' (set "
                             f"instrument.sections.{name}.value)")
    try:
        return parse_section(text, name=source)
    except ValueError as exc:
        raise InputFileError(path, str(exc)) from None


def date_obs_to_mjd(text, *, path="<header>", keyword="DATE-OBS", time_text=None):
    """Modified Julian Date (UTC) of an ISO 8601 date/time string.

    ``time_text`` (e.g. a separate ``UT`` keyword) is appended when ``text``
    holds a date only.

    Raises
    ------
    InputFileError
        When the text is not an ISO 8601 date/time.
    """
    from astropy.time import Time

    value = str(text).strip()
    if "T" not in value and time_text:
        value = f"{value}T{str(time_text).strip()}"
    try:
        return float(Time(value, format="isot" if "T" in value else "iso", scale="utc").mjd)
    except ValueError:
        raise InputFileError(path, f"keyword {keyword} = {text!r}; expected an ISO 8601 "
                             "UTC date/time like '2026-03-14T01:23:45.6'") from None


#: FITS WCS keyword families (Greisen & Calabretta 2002, A&A 395, 1061, table 7), with an
#: optional alternate-description letter
_WCS_FAMILY = re.compile(r"^(?:(?:CTYPE|CUNIT|CRPIX|CRVAL|CDELT|CROTA|CRDER|CSYER)\d+"
                         r"|(?:CD|PC|PV|PS)\d+_\d+"
                         r"|LONPOLE|LATPOLE|RADESYS|SPECSYS|RESTFRQ|RESTWAV)[A-Z]?$")
_MATRIX = re.compile(r"^[A-Z]+\d+_\d+[A-Z]?$")          # a keyword indexed by two axes
_AXIS_INDEXED = re.compile(r"^([A-Z]+)([12])$")          # ... or by one axis
_SECTION_VALUE = re.compile(r"^\s*\[\s*\d+\s*:\s*\d+\s*,\s*\d+\s*:\s*\d+\s*\]\s*$")


def is_raw_geometry_keyword(keyword, value, *, header_keywords=(), keep=()):
    """True for a keyword about the raw pixel grid (wrong after trim and reorientation).

    Parameters
    ----------
    keyword : str
        Card keyword.
    value : object
        Card value.
    header_keywords : collection of str
        All keywords of the header (a family ``XXX1``/``XXX2`` counts as axis-indexed
        only when both are present).
    keep : collection of str
        Keywords never dropped (those the configuration names, e.g. setup keywords).

    Returns
    -------
    bool
        True for FITS WCS keywords, names starting with ``WCS`` or containing
        ``AXIS``, keyword families indexed by two raw axes or by a matrix index
        ``i_j``, and string values that are pixel sections ``[x1:x2,y1:y2]``.
    """
    key = str(keyword).upper()
    if key in keep:
        return False
    if _WCS_FAMILY.match(key) or key.startswith("WCS") or "AXIS" in key or _MATRIX.match(key):
        return True
    m = _AXIS_INDEXED.match(key)
    if m and {m.group(1) + "1", m.group(1) + "2"} <= set(header_keywords):
        return True
    return isinstance(value, str) and bool(_SECTION_VALUE.match(value))
