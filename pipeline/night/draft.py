"""Draft an instrument file from a folder of raw frames (``longslit-draft-instrument``).

A new user of the pipeline has a night of raw frames and the instrument's manual.
This command surveys the night's headers (:mod:`pipeline.night.survey`) and writes
a commented instrument file with the same keys as ``config/instruments/*.yaml``:
every value it could infer, with the evidence beside it, and a ``TODO`` comment
with ``null`` where it could not (the optics, the pixel scale, the direction of
the wavelengths). A ``null`` left in a required key stops the workflow with the key
named, so a forgotten TODO cannot pass unnoticed.

Usage::

    longslit-draft-instrument RAW_DIR -o my_instrument.yaml [--name NAME] [--force]
"""

import argparse
import datetime as _dt
import math
import re
import sys
from collections import Counter
from pathlib import Path

import numpy as np
import yaml

from pipeline.night import survey as sv

__all__ = ["draft_instrument", "DraftResult", "lamp_species", "main"]

#: element symbols of the shipped arc line list (pipeline/data/arc_lines_air.csv)
_LINE_LIST_ELEMENTS = ("Hg", "Ar", "Ne", "He", "Kr", "Xe", "Cd")
_ELEMENT = re.compile(r"[A-Z][a-z]?")


def lamp_species(item):
    """Species of the shipped line list a lamp name suggests (neutral atoms), or [].

    Examples
    --------
    >>> lamp_species("HgAr")
    ['Hg I', 'Ar I']
    >>> lamp_species("ThAr")
    ['Ar I']
    >>> lamp_species("QTH")
    []
    >>> lamp_species("KRYPTON")
    ['Kr I']
    """
    found = []
    name = str(item).strip().upper()
    if name in sv.ELEMENT_SYMBOLS:
        return [f"{sv.ELEMENT_SYMBOLS[name]} I"]
    for symbol in _ELEMENT.findall(str(item)):
        if symbol in _LINE_LIST_ELEMENTS and f"{symbol} I" not in found:
            found.append(f"{symbol} I")
    return found


def _split_lamps(value):
    return [p for p in re.split(r"[,+;/\s]+", str(value).strip()) if p]


def _scalar(value):
    """One YAML scalar in flow style."""
    text = yaml.safe_dump(value, default_flow_style=True, width=10_000).strip()
    return text[:-4].strip() if text.endswith("\n...") or text.endswith(" ...") else text


class _Writer:
    """Lines of YAML with a comment column."""

    def __init__(self):
        self.lines = []
        self.todos = []

    def comment(self, text, indent=0):
        for part in str(text).splitlines() or [""]:
            self.lines.append(" " * indent + ("# " + part if part else "#"))

    def key(self, indent, key, value=None, comment="", *, todo=False, block=False):
        head = " " * indent + f"{key}:"
        if not block:
            head += " " + _scalar(value)
        if todo:
            self.todos.append(key)
            comment = "TODO: " + comment
        if comment:
            head = head.ljust(max(len(head) + 1, 34)) + " # " + comment
        self.lines.append(head)

    def text(self):
        return "\n".join(self.lines) + "\n"


class DraftResult:
    """The drafted file's text, its TODO keys and the survey behind it."""

    def __init__(self, text, todos, survey, guesses):
        self.text = text
        self.todos = todos
        self.survey = survey
        self.guesses = guesses

    @property
    def instrument(self):
        """The drafted ``instrument`` section as a dict (TODO values are None)."""
        return yaml.safe_load(self.text)["instrument"]


def _most_common(survey, keyword):
    counts = survey.distinct(keyword) if keyword else Counter()
    return counts.most_common(1)[0][0] if counts else None


def _type_of_file(merged, type_keyword, mapping):
    value = str(merged.get(type_keyword, "")).strip()
    for frame_type, values in mapping.items():
        if value in values:
            return frame_type
    return None


def _read_pixels(path, hdu):
    from astropy.io import fits

    with fits.open(path, memmap=False) as hdul:
        return np.asarray(hdul[hdu].data, dtype=float)


def _coordinate_format(survey, keyword):
    values = list(survey.distinct(keyword)) if keyword else []
    if not values:
        return "no values"
    if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in values):
        return "numbers (degrees)"
    if any(isinstance(v, str) and (":" in v or " " in v.strip() or "h" in v) for v in values):
        return "sexagesimal text (RA in hours, Dec in degrees): read as such"
    return "numeric text (degrees)"


def _tilt_clusters(survey, keyword, tolerance):
    from pipeline.night.setups import cluster_values

    values = [float(v) for m in survey.merged for v in [m.get(keyword)]
              if isinstance(v, (int, float)) and not isinstance(v, bool)]
    if not values:
        return ""
    labels = cluster_values(values, tolerance)
    spans = [np.ptp(np.array(values)[labels == k]) for k in range(labels.max() + 1)]
    return (f"{len(set(values))} distinct values form {labels.max() + 1} setup(s) within "
            f"{tolerance:g} (largest spread {max(spans):.4g})")


def draft_instrument(raw_dir, *, name=None):
    """Survey ``raw_dir`` and return the drafted instrument file.

    Parameters
    ----------
    raw_dir : str or Path
        Folder of one night's raw frames (read only).
    name : str or None
        Instrument name; default: the INSTRUME value, else the folder name.

    Returns
    -------
    DraftResult
    """
    survey = sv.survey_headers(raw_dir)
    frame_type = sv.find_frame_type_keyword(survey)
    on_sky = ("ra_deg", "dec_deg", "airmass")     # written on sky frames only, often
    numeric = {"exposure_time_s", "airmass", "grating_tilt_deg", "slit_width_arcsec", "gain",
               "read_noise", "saturation", "latitude", "longitude", "height"}
    taken = {frame_type.value[0]} if frame_type.value else set()
    g = {}
    # roles with the most specific values first, so later fallbacks do not take their keywords
    order = ("date_obs", "data_section", "overscan_section", "binning", "grating_tilt_deg",
             "ra_deg", "dec_deg",
             "airmass", "lamps", "gain", "read_noise", "saturation", "latitude", "longitude",
             "height", "grating", "slit_width_arcsec", "filter",
             "exposure_time_s", "object")
    for role in order + tuple(r for r in sv.KEYWORD_NAMES if r not in order):
        g[role] = sv.find_keyword(survey, role, numeric=True if role in numeric else None,
                                  min_fraction=0.01 if role in on_sky else 0.3, exclude=taken)
        if g[role].value:
            taken.add(g[role].value)
    g["frame_type"] = frame_type
    w = _Writer()
    today = _dt.date.today().isoformat()
    w.comment(f"Instrument file drafted by longslit-draft-instrument on {today} from "
              f"{len(survey.files)} raw files in {raw_dir}")
    w.comment("(unreadable: " + ", ".join(f"{Path(p).name} [{why}]" for p, why in
                                          survey.unreadable.items()) + ")"
              if survey.unreadable else "(every file was readable)")
    w.comment("Check every value against the instrument's manual. Each TODO is a value the "
              "headers do not tell;")
    w.comment("a null left in a required key stops the workflow with the key named. Keys and "
              "their meaning: config/schema.yaml.")
    w.key(0, "instrument", block=True)
    inst_name = name or _most_common(survey, g["instrument"].value) or Path(raw_dir).name
    w.key(2, "name", str(inst_name).strip(), g["instrument"].evidence if not name else "given")
    w.key(2, "pixel_extension", survey.pixel_hdu.value, survey.pixel_hdu.evidence)
    suffixes = Counter("".join(Path(p).suffixes[-2:]) if p.endswith(".gz") else Path(p).suffix
                       for p in survey.files)
    w.key(2, "file_patterns", sorted(f"*{s}" for s in suffixes), "file names seen in the folder")

    # -- frame types ----------------------------------------------------------------------
    if frame_type.value is None:
        w.key(2, "frame_type_keyword", None, frame_type.evidence, todo=True)
        mapping, unknown = {}, []
    else:
        keyword, mapping, unknown = frame_type.value
        w.key(2, "frame_type_keyword", keyword, frame_type.evidence)
    w.key(2, "frame_types", block=True, comment="header values of the frame-type keyword")
    for kind in ("bias", "flat", "arc", "standard", "science"):
        values = mapping.get(kind, [])
        if values:
            w.key(4, kind, values, "guessed from the value's name")
        elif kind == "standard":
            w.key(4, kind, [], "no value names standards: if they are written like science "
                  "frames, list their OBJECT names under flux_calibration.standard_flux_tables "
                  "and the type value here", todo=True)
        else:
            w.key(4, kind, [], f"no value looks like a {kind} frame", todo=True)
    ignore = mapping.get("ignore", [])
    w.key(4, "ignore", ignore + unknown,
          ("not recognised, check: " + ", ".join(unknown)) if unknown else
          "skipped frame types (focus, test, ...)", todo=bool(unknown))

    # -- keywords -------------------------------------------------------------------------
    w.key(2, "keywords", block=True, comment="header keywords the pipeline reads")
    roles = [("object", "object"), ("exposure_time_s", "exposure_time_s"),
             ("date_obs", "date_obs"), ("time_obs", "time_obs"), ("airmass", "airmass"),
             ("ra_deg", "ra_deg"),
             ("dec_deg", "dec_deg"), ("grating", "grating"),
             ("grating_tilt_deg", "grating_tilt_deg"), ("slit_width_arcsec", "slit_width_arcsec"),
             ("binning", "binning"), ("filter", "filter"), ("lamps", "lamps")]
    required = {"object", "exposure_time_s", "date_obs", "grating_tilt_deg"}
    convention = airmass_convention(survey, g)
    matched = convention is not None and convention["median_abs"] < 0.02
    for key, role in roles:
        guess = g[role]
        comment = guess.evidence
        if role == "airmass" and matched:
            comment += (f"; it is the airmass at the {convention['when']} of the exposure "
                        f"(computed values agree to {convention['median_abs']:.4f} in "
                        f"{convention['n']} frames); the pipeline uses the exposure mean "
                        "(observing.airmass: computed)")
        if role in ("ra_deg", "dec_deg") and guess.value:
            comment += "; format: " + _coordinate_format(survey, guess.value)
        if role == "time_obs" and guess.value:
            comment += "; completes a DATE-OBS that holds a date alone"
        if guess.value is None:
            if key in required:
                w.key(4, key, None, comment + "; name the keyword", todo=True)
            else:
                w.comment(f"{key}: not found ({guess.evidence}); add it if the headers "
                          "have it", indent=4)
        else:
            w.key(4, key, guess.value, comment)
    setup = [g[r].value for r in ("grating", "grating_tilt_deg", "slit_width_arcsec", "binning",
                                  "filter") if g[r].value]
    w.key(2, "setup_keywords", setup, "frames sharing these values share a setup")
    readout = [g["binning"].value] if g["binning"].value else []
    w.key(2, "readout_keywords", readout, "biases are combined per readout mode"
          + ("" if readout else "; add the binning/readout-speed keywords"), todo=not readout)
    tilt = g["grating_tilt_deg"].value
    if tilt:
        w.key(2, "setup_tolerances", {tilt: 0.01},
              "the tilt encoder's repeatability (0.01 deg assumed; check): "
              + _tilt_clusters(survey, tilt, 0.01), todo=True)

    # -- detector -------------------------------------------------------------------------
    w.key(2, "sections", block=True, comment="FITS-style 1-based [x1:x2,y1:y2]; keyword wins")
    for indent, key, role, missing in (
            (4, "data", "data_section", "no section keyword; give the value"),
            (4, "overscan", "overscan_section", "no section keyword; give the value"),
            (2, "gain_e_per_adu", "gain", "no keyword found; give the value in e-/ADU"),
            (2, "read_noise_e", "read_noise", "no keyword found; give the value in e-")):
        guess = g[role]
        if guess.value:
            w.key(indent, key, {"keyword": guess.value, "value": None}, guess.evidence)
        else:
            w.key(indent, key, {"keyword": None, "value": None},
                  f"{missing} ({guess.evidence})", todo=True)
    saturation = _most_common(survey, g["saturation"].value)
    bitpix = survey.bitpix.most_common(1)[0][0]
    if saturation is not None:
        w.key(2, "saturation_adu", saturation, g["saturation"].evidence)
    elif bitpix == 16:
        w.key(2, "saturation_adu", 65535, "ADC maximum of 16-bit data assumed; use the "
              "detector's linearity limit", todo=True)
    else:
        w.key(2, "saturation_adu", None, f"BITPIX {bitpix}: give the saturation level",
              todo=True)
    axis = _dispersion_axis(survey, g["frame_type"])
    w.key(2, "dispersion_axis", axis.value, axis.evidence, todo=axis.value is None)
    w.key(2, "wavelength_increases_with_pixel", None, "whether wavelength grows with raw pixel "
          "index along dispersion_axis (from the manual or by identifying two arc lines)",
          todo=True)
    w.key(2, "spatial_scale_arcsec_per_px", None, "unbinned pixel scale along the slit",
          todo=True)
    w.key(2, "grating", block=True, comment="nominal optics from the manual; the arc fit "
          "refines tilt and focal length")
    grating_names = sorted(str(v) for v in survey.distinct(g["grating"].value)) \
        if g["grating"].value else []
    for key, text in (("groove_density_per_mm", "grooves per mm of "
                       + (", ".join(grating_names) or "the grating")),
                      ("order", "diffraction order used"),
                      ("camera_collimator_angle_deg", "angle between camera and collimator axes"),
                      ("camera_focal_length_mm", "camera focal length"),
                      ("pixel_size_um", "unbinned detector pixel size")):
        w.key(4, key, None, text, todo=True)
    shape = survey.shapes.most_common(1)[0][0]
    w.key(4, "detector_pixels_dispersion", None, f"unbinned pixels along the dispersion (raw "
          f"frames are {shape[1]} x {shape[0]}, NAXIS1 x NAXIS2, incl. overscan); for "
          "longslit-grating only", todo=True)
    filters = sorted(str(v).strip() for v in survey.distinct(g["filter"].value)) \
        if g["filter"].value else []
    w.key(4, "order_blocking_filters", {f: None for f in filters},
          "cut-on wavelength (Angstrom) of each FILTER value; null = no blocking",
          todo=bool(filters))
    # -- lamps ----------------------------------------------------------------------------
    w.key(2, "lamps", block=True, comment="each item of the lamps keyword on arcs -> species "
          "in the shipped line list")
    items = []
    if g["lamps"].value and frame_type.value:
        for merged in survey.merged:
            if _type_of_file(merged, frame_type.value[0], frame_type.value[1]) == "arc":
                items.extend(_split_lamps(merged.get(g["lamps"].value, "")))
    for item in sorted(set(items)):
        species = lamp_species(item)
        w.key(4, item, species, "from the element symbols in the name" if species else
              "no species of the shipped line list recognised", todo=not species)
    if not items:
        w.comment("TODO: no arc lamps found; list each lamp name -> species", indent=4)
        w.todos.append("lamps")
    # -- site -----------------------------------------------------------------------------
    w.key(2, "site", block=True)
    for key, role, text in (("latitude_deg", "latitude", "deg north"),
                            ("longitude_deg", "longitude", "deg EAST of Greenwich"),
                            ("height_m", "height", "m above sea level")):
        value = _most_common(survey, g[role].value)
        if value is None:
            w.key(4, key, None, f"{text}; not in the headers", todo=True)
        elif role == "longitude" and matched:
            flipped = convention["sign"] < 0
            w.key(4, key, -float(value) if flipped else value,
                  f"{g[role].evidence}; {text}: "
                  + ("the header's is west-positive, sign flipped: " if flipped else "")
                  + f"header airmasses agree to {convention['median_abs']:.4f} with it, "
                  + (f"to {convention['other_sign_median_abs']:.3f} with the opposite sign"
                     if math.isfinite(convention["other_sign_median_abs"]) else
                     "the targets are below the horizon with the opposite sign"))
        else:
            w.key(4, key, value, f"{g[role].evidence}; {text}"
                  + ("; check the header's sign convention" if role == "longitude" else ""),
                  todo=role == "longitude")
    w.key(4, "extinction_table", None, "ECSV of the site's mean extinction (mag/airmass)",
          todo=True)
    return DraftResult(w.text(), list(w.todos), survey, g)


def airmass_convention(survey, g, *, max_frames=6):
    """What the header airmass means, and the sign of the header longitude.

    For up to ``max_frames`` frames with coordinates, DATE-OBS, EXPTIME and AIRMASS,
    the airmass at the start, middle and as the mean of the exposure is computed
    (:mod:`pipeline.core.observing`) with the header longitude taken east-positive
    and west-positive; the combination closest to the header values wins.

    Returns
    -------
    dict or None
        ``{'sign': +1 or -1, 'when': 'start'|'middle'|'mean', 'median_abs': float,
        'other_sign_median_abs': float, 'n': int}``; None when no frame allows it.
    """
    from pipeline.core import observing as obs

    names = [g[r].value for r in ("ra_deg", "dec_deg", "date_obs", "exposure_time_s", "airmass")]
    lat, lon, height = (_most_common(survey, g[r].value) for r in ("latitude", "longitude",
                                                                    "height"))
    if None in names or lat is None or lon is None:
        return None
    rows = [m for m in survey.merged if all(m.get(n) not in (None, "") for n in names)]
    rows = rows[:max_frames]
    if not rows:
        return None
    diffs = {}
    for sign in (1, -1):
        site = obs.site_location({"latitude_deg": lat, "longitude_deg": sign * float(lon),
                                  "height_m": height or 0.0})
        for m in rows:
            try:
                coord = obs.parse_coordinates(m[names[0]], m[names[1]])
                start = obs.exposure_start(m[names[2]], time_obs=m.get(g["time_obs"].value)
                                           if g["time_obs"].value else None)
                eff = obs.effective_airmass(coord, start, float(m[names[3]]), site)
            except (ValueError, TypeError):
                continue
            header = float(m[names[4]])
            for when, value in (("start", eff.start), ("middle", eff.middle),
                                ("mean", eff.value)):
                diffs.setdefault((sign, when), []).append(abs(value - header))
    if not diffs:
        return None
    (sign, when), best = min(diffs.items(), key=lambda item: np.median(item[1]))
    other = min((np.median(v) for (s, _), v in diffs.items() if s != sign),
                default=math.inf)   # inf: below the horizon with the other sign
    return {"sign": sign, "when": when, "median_abs": float(np.median(best)),
            "other_sign_median_abs": float(other), "n": len(best)}


def _dispersion_axis(survey, frame_type):
    if frame_type.value is None:
        return sv.Guess(None, "no arc identified (no frame-type keyword)")
    keyword, mapping, _ = frame_type.value
    arcs = [path for path, merged in zip(survey.files, survey.merged)
            if _type_of_file(merged, keyword, mapping) == "arc"]
    if not arcs:
        return sv.Guess(None, "no arc frame in the night: give the FITS axis along which "
                        "wavelength runs")
    hdu = survey.pixel_hdu.value
    try:
        pixels = _read_pixels(arcs[0], hdu)
    except Exception as exc:  # a damaged arc: say so, do not stop the draft
        return sv.Guess(None, f"{Path(arcs[0]).name} unreadable ({type(exc).__name__})")
    guess = sv.dispersion_axis_from_arc(pixels)
    return sv.Guess(guess.value, f"{Path(arcs[0]).name}: {guess.evidence}")


def main(argv=None):
    """Command line: ``longslit-draft-instrument RAW_DIR -o FILE``."""
    parser = argparse.ArgumentParser(
        prog="longslit-draft-instrument",
        description="Draft an instrument file (config/instruments/*.yaml keys) from a folder of "
                    "raw frames: what the headers tell, with the evidence, and TODO for the rest.")
    parser.add_argument("raw_dir", help="folder of one night's raw FITS frames (read only)")
    parser.add_argument("-o", "--output", required=True, help="instrument file to write (YAML)")
    parser.add_argument("--name", help="instrument name (default: INSTRUME of the headers)")
    parser.add_argument("--force", action="store_true", help="overwrite an existing file")
    args = parser.parse_args(argv)
    out = Path(args.output)
    if out.exists() and not args.force:
        print(f"{out}: exists; choose another name or add --force", file=sys.stderr)
        return 2
    try:
        result = draft_instrument(args.raw_dir, name=args.name)
    except FileNotFoundError as exc:
        print(f"longslit-draft-instrument: {exc}", file=sys.stderr)
        return 2
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(result.text)
    print(f"wrote {out}: {len(result.survey.files)} files surveyed, "
          f"{len(result.todos)} TODO to fill ({', '.join(result.todos)})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
