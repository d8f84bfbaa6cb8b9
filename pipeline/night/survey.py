"""Survey the raw frames of a night of an unknown instrument: what its headers say.

Used by the instrument-drafting command (:mod:`pipeline.night.draft`). Reads every
file's headers (all HDUs) and, for one arc, a band of pixels. Nothing here is
specific to one instrument: each inference is a rule that says what it looked
for, and each result carries the evidence (``Guess.evidence``) that the drafted
file prints beside the value, so the user can check it.

Inferences:

* the pixel HDU: the HDU holding a 2-D image in most files;
* every keyword's distinct values per HDU (:class:`HeaderSurvey`);
* the frame-type keyword: the text keyword whose values look most like frame
  types (bias/zero, flat, arc/comp/lamp, standard, object/science), and which
  value is which type (:func:`classify_type_value`);
* keywords by role (exposure time, date, coordinates, grating, tilt, slit,
  binning, filter, lamps, gain, read noise, sections, saturation, site) from
  names in common use and the kind of their values;
* the coordinate format (degrees or sexagesimal);
* the dispersion axis from an arc: arc lines are narrow along the dispersion
  and long along the slit (:func:`dispersion_axis_from_arc`).
"""

import math
import re
import warnings
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.utils.exceptions import AstropyUserWarning

from pipeline.night.inventory import find_files

__all__ = ["HeaderSurvey", "Guess", "survey_headers", "classify_type_value",
           "find_frame_type_keyword", "find_keyword", "dispersion_axis_from_arc", "KEYWORD_NAMES",
           "RAW_PATTERNS", "ELEMENT_SYMBOLS"]

RAW_PATTERNS = ("*.fits", "*.fit", "*.fts", "*.fits.gz", "*.fit.gz", "*.fits.fz")

#: names in common use for each role, most common first (common practice)
KEYWORD_NAMES = {
    "object": ["OBJECT", "OBJNAME", "TARGNAME", "TARGET"],
    "exposure_time_s": ["EXPTIME", "EXPOSURE", "EXPTIM", "ITIME", "EXP_TIME", "ELAPTIME"],
    "date_obs": ["DATE-OBS", "DATE_OBS", "DATEOBS", "DATE-BEG", "DATE"],
    "time_obs": ["UT", "TIME-OBS", "UTSTART", "UT-START", "TIME_OBS", "UTC"],
    "airmass": ["AIRMASS", "SECZ", "AMSTART", "AIRMASS1"],
    "ra_deg": ["RA", "OBJRA", "RA_OBJ", "TELRA", "RA-D", "CAT-RA", "RA_TARG"],
    "dec_deg": ["DEC", "OBJDEC", "DEC_OBJ", "TELDEC", "DEC-D", "CAT-DEC", "DEC_TARG"],
    "grating": ["GRATING", "GRATNAME", "GRAT_ID", "GRISM", "DISPERSR", "DISPERSE", "GRATING1"],
    "grating_tilt_deg": ["GRTILT", "GRANGLE", "GRT_ANG", "GRATANG", "GR_ANGLE", "TILT",
                         "GRATTILT", "GRTANGLE", "ANGLE"],
    "slit_width_arcsec": ["SLITWID", "SLITWIDT", "SLIT_W", "SLITWIDTH", "SLIT", "APERTURE"],
    "binning": ["CCDSUM", "BINNING", "CCDBIN", "BIN", "CCDBINNG"],
    "filter": ["FILTER", "FILTER1", "FILTNAME", "FILTERS", "BLOCKING", "ORDERFLT"],
    "lamps": ["LAMPS", "LAMP", "ARCLAMP", "LAMPNAME", "CALLAMP", "LAMPON", "COMPLAMP"],
    "gain": ["GAIN", "EGAIN", "CCDGAIN", "GAIN1", "DETGAIN"],
    "read_noise": ["RDNOISE", "RDNOISE1", "READNOIS", "RON", "RNOISE", "READNOISE"],
    "data_section": ["DATASEC", "TRIMSEC", "DATASEC1"],
    "overscan_section": ["BIASSEC", "OVERSCAN", "OVERSEC", "BIASSEC1", "OSCANSEC"],
    "saturation": ["SATURATE", "SATLEVEL", "SATUR", "MAXLIN"],
    "latitude": ["SITELAT", "LATITUDE", "OBS-LAT", "OBSLAT", "LAT-OBS", "TELLAT"],
    "longitude": ["SITELONG", "LONGITUD", "OBS-LONG", "OBSLON", "LONG-OBS", "TELLONG",
                  "LONGITUDE"],
    "height": ["SITEELEV", "ALTITUDE", "OBS-ELEV", "ELEVATIO", "OBSALT", "HEIGHT"],
    "instrument": ["INSTRUME", "INSTRUMENT"],
    "equinox": ["EQUINOX", "EPOCH"],
}

#: regular expressions that mark a frame-type value (common practice)
_TYPE_PATTERNS = (
    ("bias", r"\b(bias|zero)\b|^bias|^zero"),
    ("flat", r"flat|qth|quartz|halogen|tungsten"),
    ("arc", r"\barc|comp|lamp|wave|thar|hene|cuar|neon|argon"),
    ("standard", r"\bstd\b|standard|^std|flux"),
    ("science", r"^obj|object|science|^sci|target|light"),
    ("ignore", r"focus|test|dark|junk|acq|pointing|sky\b|align|unknown"),
)

_STRUCTURAL = {"SIMPLE", "BITPIX", "NAXIS", "NAXIS1", "NAXIS2", "NAXIS3", "EXTEND", "XTENSION",
               "PCOUNT", "GCOUNT", "BZERO", "BSCALE", "CHECKSUM", "DATASUM", "COMMENT", "HISTORY",
               "", "EXTNAME", "EXTVER", "INHERIT"}


@dataclass(frozen=True)
class Guess:
    """An inferred value with the evidence for it (None = could not infer)."""

    value: object
    evidence: str


@dataclass
class HeaderSurvey:
    """Every keyword's values over the night.

    Attributes
    ----------
    files : list of str
        Files read.
    unreadable : dict
        path -> why it could not be read.
    pixel_hdu : Guess
        Index (int) of the HDU with the raw pixels, or its EXTNAME.
    values : dict
        HDU index -> keyword -> Counter of values (every file).
    merged : list of dict
        Per readable file: keyword -> value, primary header overridden by the
        pixel HDU (what the pipeline reads).
    shapes : Counter
        ``(ny, nx)`` of the pixel HDU over the files.
    """

    files: list
    unreadable: dict
    pixel_hdu: Guess
    values: dict
    merged: list = field(default_factory=list)
    shapes: Counter = field(default_factory=Counter)
    bitpix: Counter = field(default_factory=Counter)

    def distinct(self, keyword):
        """Counter of the values of ``keyword`` over the files (merged headers)."""
        return Counter(_hashable(m[keyword]) for m in self.merged if keyword in m)

    def fraction_with(self, keyword):
        return sum(keyword in m for m in self.merged) / max(1, len(self.merged))


def _hashable(value):
    return value if isinstance(value, (str, int, float, bool)) else str(value)


def survey_headers(raw_dir):
    """Read every raw file's headers (no pixels) and collect the keywords' values.

    Returns
    -------
    HeaderSurvey

    Raises
    ------
    FileNotFoundError
        When ``raw_dir`` is not a folder or holds no FITS file.
    """
    raw_dir = Path(raw_dir)
    if not raw_dir.is_dir():
        raise FileNotFoundError(f"{raw_dir}: not a folder; expected the folder of a night's "
                                "raw FITS frames")
    paths = find_files(raw_dir, RAW_PATTERNS)
    if not paths:
        raise FileNotFoundError(f"{raw_dir}: no files matching {', '.join(RAW_PATTERNS)}")
    per_file = []
    unreadable = {}
    image_hdus = Counter()
    for path in paths:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", AstropyUserWarning)
                with fits.open(path, memmap=False, lazy_load_hdus=True) as hdul:
                    headers = [(hdu.name, hdu.header.copy()) for hdu in hdul]
        except Exception as exc:  # junk files raise OSError, ValueError, ...
            unreadable[str(path)] = f"{type(exc).__name__}: {str(exc).splitlines()[0][:80]}"
            continue
        images = [i for i, (_, h) in enumerate(headers) if h.get("NAXIS", 0) == 2]
        if not images:
            unreadable[str(path)] = "no 2-D image in any HDU"
            continue
        image_hdus[(images[0], headers[images[0]][0])] += 1
        per_file.append((str(path), headers, images[0]))
    if not per_file:
        raise FileNotFoundError(f"{raw_dir}: no readable FITS image among {len(paths)} files")
    (index, name), count = image_hdus.most_common(1)[0]
    use_name = index > 0 and name and name != "PRIMARY"
    pixel_hdu = Guess(name if use_name else index,
                      f"HDU {index}{' (' + name + ')' if name else ''} holds a 2-D image in "
                      f"{count} of {len(per_file)} readable files")
    values = {}
    merged = []
    shapes = Counter()
    bitpix = Counter()
    for path, headers, first_image in per_file:
        for i, (_, header) in enumerate(headers):
            bucket = values.setdefault(i, {})
            for card in header.cards:
                if card.keyword in _STRUCTURAL:
                    continue
                bucket.setdefault(card.keyword, Counter())[_hashable(card.value)] += 1
        pix = headers[index][1] if index < len(headers) else headers[first_image][1]
        combined = {c.keyword: c.value for c in headers[0][1].cards if c.keyword not in _STRUCTURAL}
        combined.update({c.keyword: c.value for c in pix.cards if c.keyword not in _STRUCTURAL})
        merged.append(combined)
        shapes[(int(pix.get("NAXIS2", 0)), int(pix.get("NAXIS1", 0)))] += 1
        bitpix[int(pix.get("BITPIX", 0))] += 1
    return HeaderSurvey(files=[p for p, _, _ in per_file], unreadable=unreadable,
                        pixel_hdu=pixel_hdu, values=values, merged=merged, shapes=shapes,
                        bitpix=bitpix)


def classify_type_value(value):
    """The frame type a header value suggests, or None.

    Examples
    --------
    >>> [classify_type_value(v) for v in ("ZERO", "Dome Flat", "COMP", "std", "OBJECT", "foo")]
    ['bias', 'flat', 'arc', 'standard', 'science', None]
    """
    text = str(value).strip().lower()
    for frame_type, pattern in _TYPE_PATTERNS:
        if re.search(pattern, text):
            return frame_type
    return None


def find_frame_type_keyword(survey):
    """The keyword whose values look most like frame types, with the value map.

    Returns
    -------
    Guess
        value = ``(keyword, {frame_type: [values]}, [unclassified values])`` or None.
    """
    best = None
    for keyword in {k for m in survey.merged for k in m}:
        counts = survey.distinct(keyword)
        if not counts or len(counts) > 20 or not all(isinstance(v, str) for v in counts):
            continue
        kinds = {v: classify_type_value(v) for v in counts}
        known = {k for k in kinds.values() if k and k != "ignore"}
        if len(known) < 2:
            continue
        coverage = sum(n for v, n in counts.items() if kinds[v]) / sum(counts.values())
        score = (len(known), coverage, keyword in ("IMAGETYP", "OBSTYPE", "IMAGETYPE", "EXPTYPE"))
        if best is None or score > best[0]:
            best = (score, keyword, kinds, counts)
    if best is None:
        return Guess(None, "no text keyword has values that look like two or more frame types")
    _, keyword, kinds, counts = best
    mapping = {}
    for value in sorted(kinds):
        if kinds[value]:
            mapping.setdefault(kinds[value], []).append(value.strip())
    unknown = sorted(v.strip() for v, k in kinds.items() if k is None)
    summary = ", ".join(f"{v.strip()!r} x{n}" for v, n in counts.most_common())
    return Guess((keyword, mapping, unknown), f"{keyword} values: {summary}")


_SEXAGESIMAL = re.compile(r"^\s*[+-]?\d{1,3}(?:[: ]\d{1,2}[: ]\d{1,2}(?:\.\d*)?|[hd]\d{1,2}m)")
_ISO_TIME = re.compile(r"^\s*\d{4}-\d{2}-\d{2}T\d{2}:\d{2}")
_SECTION = re.compile(r"^\s*\[\s*\d+\s*:\s*\d+\s*,\s*\d+\s*:\s*\d+\s*\]\s*$")
ELEMENT_SYMBOLS = _ELEMENT_NAMES = {"MERCURY": "Hg", "ARGON": "Ar", "NEON": "Ne", "HELIUM": "He", "KRYPTON": "Kr",
                  "XENON": "Xe", "CADMIUM": "Cd"}


def _numbers(values, low=-math.inf, high=math.inf):
    return bool(values) and all(_is_number(v) and low <= v <= high for v in values)


def _texts(values, pattern=None):
    return bool(values) and all(isinstance(v, str) for v in values) and (
        pattern is None or all(pattern.match(v) for v in values))


def _binning_like(values):
    return _texts(values, re.compile(r"^\s*\d+\s*[ x,*]\s*\d+\s*$|^\s*\d+\s*$"))


def _lamp_like(values):
    words = {w for v in values if isinstance(v, str) for w in re.split(r"[,+;/\s]+", v.upper())}
    return bool(words & set(_ELEMENT_NAMES)) or any(
        re.search(r"(Hg|Ar|Ne|He|Kr|Xe|Cd)", str(v)) for v in values)


#: when no name of :data:`KEYWORD_NAMES` is present: name fragments and a test on the
#: night's values (a rule of thumb each; the draft prints the evidence for the user to check)
_FALLBACKS = {
    "object": (("OBJ", "TARG", "SRC", "NAME"), lambda v: _texts(v) and len(v) >= 3),
    "exposure_time_s": (("EXP", "SHUT", "TIME", "ITIME"), lambda v: _numbers(v, 0.0, 1e6)),
    "date_obs": (("DATE", "OPEN", "START", "OBS", "UT"), lambda v: _texts(v, _ISO_TIME)),
    "airmass": (("AM", "AIRM", "SECZ"), lambda v: _numbers(v, 1.0, 40.0)),
    "ra_deg": (("RA",), lambda v: _numbers(v, 0.0, 360.0) or _texts(v, _SEXAGESIMAL)),
    "dec_deg": (("DEC", "DE"), lambda v: _numbers(v, -90.0, 90.0) or _texts(v, _SEXAGESIMAL)),
    "grating": (("GRAT", "GRISM", "DISP"), _texts),
    "grating_tilt_deg": (("TILT", "ANG", "POS", "GRAT"), lambda v: _numbers(v, -80.0, 80.0)),
    "slit_width_arcsec": (("SLIT",), lambda v: _numbers(v, 0.0, 100.0)),
    "binning": (("BIN", "SUM"), _binning_like),
    "filter": (("FILT", "FLT", "BLOCK"), _texts),
    "lamps": (("LAMP", "CAL", "ARC", "COMP", "SRC"), lambda v: _texts(v) and _lamp_like(v)),
    "gain": (("GAIN",), lambda v: _numbers(v, 0.0, 1e3)),
    "read_noise": (("NOISE", "RON", "RDN", "READN"), lambda v: _numbers(v, 0.0, 1e3)),
    "data_section": (("DATA", "TRIM"), lambda v: _texts(v, _SECTION)),
    "overscan_section": (("OSCAN", "BIAS", "OVER"), lambda v: _texts(v, _SECTION)),
    "saturation": (("SAT", "MAXLIN"), lambda v: _numbers(v, 1.0, 1e7)),
    "latitude": (("LAT",), lambda v: _numbers(v, -90.0, 90.0)),
    "longitude": (("LON",), lambda v: _numbers(v, -360.0, 360.0)),
    "height": (("ELEV", "HEIGHT", "ALT"), lambda v: _numbers(v, -500.0, 6000.0)),
}


def _holds(keyword, fragment):
    """Whether a keyword name holds a fragment; fragments of <= 2 letters ('RA', 'AM')
    only at its start or end (so GRATPOS does not count as an RA)."""
    if len(fragment) <= 2:
        return keyword.startswith(fragment) or keyword.endswith(fragment)
    return fragment in keyword


def find_keyword(survey, role, *, numeric=None, min_fraction=0.3, exclude=()):
    """The header keyword playing ``role``, or None.

    First the names in common use (:data:`KEYWORD_NAMES`), then any keyword whose
    name holds one of the role's fragments and whose values pass the role's test
    (e.g. ISO date-times for ``date_obs``, sexagesimal or 0-360 numbers for
    ``ra_deg``); the earlier fragment wins, then the keyword in more files.

    Parameters
    ----------
    numeric : bool or None
        True: its values must be numbers; False: text; None: either.
    min_fraction : float
        Fraction of the files that must carry it.
    exclude : collection of str
        Keywords already given another role.
    """
    def shown(name, fraction, how):
        counts = survey.distinct(name)
        values = ", ".join(repr(v) for v, _ in counts.most_common(4))
        more = f" (+{len(counts) - 4} more)" if len(counts) > 4 else ""
        return Guess(name, f"{name}{how} in {100 * fraction:.0f}% of the files; values "
                           f"{values}{more}")

    for name in KEYWORD_NAMES.get(role, []):
        fraction = survey.fraction_with(name)
        if fraction < min_fraction or name in exclude:
            continue
        counts = survey.distinct(name)
        if numeric is True and not all(_is_number(v) for v in counts):
            continue
        if numeric is False and not all(isinstance(v, str) for v in counts):
            continue
        return shown(name, fraction, "")
    fragments, test = _FALLBACKS.get(role, ((), None))
    candidates = []
    for keyword in sorted({k for m in survey.merged for k in m} - set(exclude)):
        rank = next((i for i, f in enumerate(fragments) if _holds(keyword, f)), None)
        fraction = survey.fraction_with(keyword)
        if rank is None or fraction < min_fraction:
            continue
        if test(list(survey.distinct(keyword))):
            candidates.append((rank, -fraction, keyword))
    if candidates:
        _, fraction, keyword = min(candidates)
        return shown(keyword, -fraction, f" (name holds '{fragments[min(candidates)[0]]}', "
                                         "values fit)")
    return Guess(None, f"none of {', '.join(KEYWORD_NAMES.get(role, []))} found, nor a keyword "
                       f"whose name holds {'/'.join(fragments)} with fitting values")


def _is_number(value):
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def dispersion_axis_from_arc(pixels, *, band_fraction=0.25):
    """FITS axis (1 or 2) along which an arc's lines are narrow: the dispersion axis.

    Parameters
    ----------
    pixels : ndarray, shape (ny, nx)
        An arc frame (raw; overscan columns may be present).
    band_fraction : float
        Fraction of the other axis, centred, averaged into each 1-D cut.

    Returns
    -------
    Guess
        value 1 or 2 (FITS axis), or None when neither cut shows lines.

    Notes
    -----
    A cut along the dispersion (the median over a band of the slit) crosses the
    lines: narrow peaks that a running median of 11 pixels removes. A cut along
    the slit follows one wavelength: smooth (slit illumination, whose edges a
    running median keeps). The statistic is the mean ``|cut - running median|``
    over the cut's median level; each cut is trimmed by 5 % at its ends.
    """
    from scipy.ndimage import median_filter

    data = np.asarray(pixels, dtype=float)
    sharpness = {}
    for axis_fits, along in ((1, 1), (2, 0)):
        other = data.shape[1 - along]
        half = max(1, int(band_fraction * other / 2))
        centre = other // 2
        band = data[centre - half:centre + half, :] if along == 1 else \
            data[:, centre - half:centre + half]
        cut = np.median(band, axis=0 if along == 1 else 1)
        trim = max(1, int(0.05 * cut.size))
        cut = cut[trim:-trim] - np.percentile(cut[trim:-trim], 1)
        level = np.median(np.abs(cut)) + 1e-9
        sharpness[axis_fits] = float(np.mean(np.abs(cut - median_filter(cut, 11, mode="nearest")))
                                     / level)
    best = max(sharpness, key=sharpness.get)
    other = 3 - best
    ratio = sharpness[best] / max(sharpness[other], 1e-12)
    text = (f"arc lines are narrow along FITS axis {best} (peak contrast "
            f"{sharpness[best]:.3g} vs {sharpness[other]:.3g} along axis {other})")
    if ratio < 3.0:
        return Guess(None, text + ": not decisive (ratio < 3)")
    return Guess(best, text)
