"""Header cards of the CCD products, built by pure functions from the raw header and the config.

Raw keywords that describe the raw pixel grid are wrong after trimming and
reorientation, so no calibrated header carries them
(:func:`pipeline.core.headers.is_raw_geometry_keyword`): FITS WCS keywords of any
convention (families indexed by axis, ``CTYPEn``, ``CDi_j``..., and names starting with
``WCS``), any other keyword family indexed by raw axes (``XXXn`` present for two axes,
or a matrix ``XXXi_j``), names containing ``AXIS``, and section strings
``[x1:x2,y1:y2]``. The binning keyword (raw axis order) is replaced by
``BINSPEC``/``BINSPAT``, the raw data section by ``RAWDSEC``, and a raw ``SATURATE``
(ADU) by ``SATURADU``, the saturation level in ADU that was used.
"""

import math

from pipeline.core import headers as hdr

__all__ = ["calibrated_header", "STANDARD_KEYWORDS", "standard_keyword_cards", "finite_or"]

# Keywords of the raw header that describe its storage, not the observation.
_STRUCTURAL = ("SIMPLE", "BITPIX", "NAXIS", "NAXIS1", "NAXIS2", "EXTEND", "BZERO", "BSCALE",
               "BLANK", "PCOUNT", "GCOUNT", "XTENSION", "CHECKSUM", "DATASUM", "BUNIT",
               "EXTNAME")


def _configured_keyword_names(instrument):
    """Raw keywords the instrument configuration names (never dropped as geometry)."""
    names = set()
    for value in list((instrument.get("keywords") or {}).values()) \
            + list(instrument.get("setup_keywords") or []) \
            + list(instrument.get("readout_keywords") or []) \
            + [instrument.get("frame_type_keyword")]:
        if isinstance(value, str):
            names.add(value.upper())
    return names


def calibrated_header(raw_header, layout, frame_type, instrument, *, keep=()):
    """Raw keywords minus structural and raw-geometry ones, plus the orientation cards.

    ``keep``: raw keywords kept whatever their name (e.g. those of ``instrument.keywords``)."""
    from astropy.io import fits
    header = fits.Header()
    config_section_keys = {spec.get("keyword") for spec in
                           (instrument.get("sections") or {}).values() if spec}
    binning_key = instrument.get("binning_keyword")
    keep = (_configured_keyword_names(instrument) | {str(k).upper() for k in keep if k}) \
        - {str(binning_key).upper()}
    present = set(raw_header.keys())
    for card in raw_header.cards:
        if card.keyword in _STRUCTURAL or card.keyword in config_section_keys:
            continue
        if card.keyword in ("COMMENT", "HISTORY", "") or card.keyword == binning_key:
            continue
        if card.keyword == "SATURATE" or hdr.is_raw_geometry_keyword(
                card.keyword, card.value, header_keywords=present, keep=keep):
            continue
        header[card.keyword] = (card.value, card.comment)
    if instrument.get("saturation_adu") is not None:
        header["SATURADU"] = (float(instrument["saturation_adu"]),
                              "ADU raw saturation level used")
    for card in layout.orientation.header_cards(trim_y0=layout.trim_y0, trim_x0=layout.trim_x0):
        header[card[0]] = card[1:]
    for card in layout.binning_cards():
        header[card[0]] = card[1:]
    header["FRAMETYP"] = (frame_type, "frame type assigned by the night inventory")
    header["RAWDSEC"] = (str(layout.data), "raw data section trimmed to (1-based)")
    return header


#: Standard keyword written into every calibrated frame -> key of ``instrument.keywords``
#: naming the raw keyword it is copied from. Steps after ``calibrate_frame`` read only
#: these standard names (DEVELOPERS.md, Conventions).
STANDARD_KEYWORDS = {"OBJECT": "object", "EXPTIME": "exposure_time_s", "DATE-OBS": "date_obs",
                     "AIRMASS": "airmass", "RA": "ra_deg", "DEC": "dec_deg",
                     "GRATING": "grating", "GRTILT": "grating_tilt_deg",
                     "SLITWID": "slit_width_arcsec", "FILTER": "filter", "LAMPS": "lamps"}


def standard_keyword_cards(raw_header, keywords):
    """Cards of the standard keywords, copied from the configured raw keywords.

    Parameters
    ----------
    raw_header : astropy.io.fits.Header
        Raw header (primary + pixel extension).
    keywords : dict or None
        ``instrument.keywords``: quantity -> raw keyword name; a quantity not
        configured is read from its standard name.

    Returns
    -------
    list of (keyword, value, comment)
        One card per standard keyword whose configured raw keyword is present
        (the raw card itself is kept too, under its own name).
    """
    keywords = keywords or {}
    cards = []
    for standard, quantity in STANDARD_KEYWORDS.items():
        source = keywords.get(quantity) or standard
        if source not in raw_header:
            continue
        comment = raw_header.comments[source]
        if source != standard:
            comment = f"from {source}" + (f": {comment}" if comment else "")
        cards.append((standard, raw_header[source], comment[:46]))
    return cards


def finite_or(value, default=-1.0):
    """``value`` as a float, or ``default`` when it is None or not finite (FITS cards take no NaN)."""
    return float(value) if value is not None and math.isfinite(value) else default

