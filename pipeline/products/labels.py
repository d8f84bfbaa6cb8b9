"""Words, units and digits for the morning report: column names of the QA tables become
labels a person reads, numbers are shown to the digits that matter, and a measured value
is marked pass / warn / fail against its configured limit.

Pure functions on plain values; no HTML here (the page is assembled in
:mod:`pipeline.products.report`).
"""

import math
import re

import numpy as np

__all__ = ["as_text", "label", "format_value", "Mark", "mark_upper_limit", "mark_tolerance", "mark_flag",
           "worst"]

#: labels of the keys whose plain reading would mislead or is too terse
_LABELS = {
    "n_frames": "frames combined",
    "n_used": "lines used",
    "n_rejected": "lines rejected",
    "n_bad": "bad pixels",
    "n_clipped": "values clipped",
    "rms_angstrom": "rms (Å)",
    "rms_px": "rms (px)",
    "rms_km_s": "rms (km/s)",
    "rms_percent": "rms of the fit (%)",
    "rms_binned_percent": "rms in wavelength bins (%)",
    "read_noise_e_configured_gain": "read noise (e⁻, configured gain)",
    "read_noise_configured_e": "read noise configured (e⁻)",
    "read_noise_e_measured_gain": "read noise (e⁻, measured gain)",
    "read_noise_within_tolerance": "read noise within tolerance",
    "gain_measured_e_per_adu": "gain measured (e⁻/ADU)",
    "gain_configured_e_per_adu": "gain configured (e⁻/ADU)",
    "gain_within_tolerance": "gain within tolerance",
    "response_scatter": "pixel response scatter",
    "mean_level_adu": "mean level (ADU)",
    "shift_px": "flexure shift (px)",
    "shift_err_px": "flexure error (px)",
    "shift_kms": "flexure shift (km/s)",
    "tilt_nominal_deg": "grating tilt nominal (°)",
    "tilt_fitted_deg": "grating tilt fitted (°)",
    "focal_length_nominal_mm": "camera focal length nominal (mm)",
    "focal_length_fitted_mm": "camera focal length fitted (mm)",
    "exptime_s": "exposure (s)",
    "date_obs": "start (UTC)",
    "mjd": "MJD",
    "snr_median": "median S/N per pixel",
    "flux_total_e": "total counts (e⁻)",
    "fwhm_px": "FWHM along the slit (px)",
    "trace_px": "trace row (px)",
    "trace_arcsec": "trace position (arcsec)",
    "frame_id": "frame",
    "frame_type": "type",
}

#: unit suffixes of column names (longest first) and how a person writes them
_UNITS = (
    ("_erg_s_cm2_angstrom", "erg s⁻¹ cm⁻² Å⁻¹"), ("_e_per_adu", "e⁻/ADU"), ("_angstrom", "Å"),
    ("_km_s", "km/s"), ("_kms", "km/s"), ("_arcsec", "arcsec"), ("_percent", "%"),
    ("_adu", "ADU"), ("_deg", "°"), ("_mm", "mm"), ("_px", "px"), ("_e2", "e⁻²"),
    ("_e", "e⁻"), ("_s", "s"), ("_mag", "mag"),
)


def as_text(value):
    """A table cell as text; a masked cell (an empty string read back from ECSV) is ''.

    Examples
    --------
    >>> import numpy as np
    >>> as_text(np.ma.masked), as_text("G600")
    ('', 'G600')
    """
    if value is None or value is np.ma.masked:
        return ""
    return str(value)


def label(key):
    """A readable label, with its unit, for a column or metadata name.

    Examples
    --------
    >>> label("read_noise_e_configured_gain")
    'read noise (e⁻, configured gain)'
    >>> label("line_first_px")
    'line first (px)'
    >>> label("n_matched")
    'number matched'
    """
    key = str(key)
    if key in _LABELS:
        return _LABELS[key]
    words, unit = key, ""
    for suffix, text in _UNITS:
        if words.endswith(suffix) and len(words) > len(suffix):
            words, unit = words[: -len(suffix)], text
            break
    words = re.sub(r"^n_", "number ", words).replace("_", " ").strip()
    return f"{words} ({unit})" if unit else words


def _digits_for(key):
    """Significant digits worth showing for a quantity (by its name); None: the default."""
    key = str(key)
    if key == "mjd" or key.endswith("_mjd"):
        return None
    if "wavelength" in key or key.startswith(("crval", "central")):
        return 6          # wavelengths: to 0.01 Å at 5000 Å
    return 3


def format_value(value, key=""):
    """Text of one value: numbers to the digits that matter, booleans as yes/no.

    Examples
    --------
    >>> format_value(0.022567636024492552, "rms_angstrom")
    '0.0226'
    >>> format_value(18946.921875, "level_adu")
    '18947'
    >>> format_value(61113.99444444444, "mjd")
    '61113.99444'
    >>> format_value(True)
    'yes'
    """
    if value is None or value is np.ma.masked:
        return ""
    if isinstance(value, np.ndarray) and value.ndim == 0:
        value = value.item()
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        value = float(value)
        if not math.isfinite(value):
            return "—"
        if str(key) == "mjd" or str(key).endswith("_mjd"):
            return f"{value:.5f}"
        if value == 0:
            return "0"
        digits = _digits_for(key)
        magnitude = math.floor(math.log10(abs(value)))
        if magnitude >= digits - 1:
            return f"{value:.0f}"
        return f"{value:.{max(digits - 1 - magnitude, 0)}f}"
    if isinstance(value, (list, tuple, np.ndarray)):
        return ", ".join(format_value(v, key) for v in value)
    return str(value)


class Mark:
    """Marks against a limit, worst last."""

    PASS = "pass"
    WARN = "warn"
    FAIL = "fail"
    NONE = ""
    ORDER = (NONE, PASS, WARN, FAIL)


def worst(marks):
    """The worst of several marks ('' when none)."""
    marks = [m for m in marks if m in Mark.ORDER]
    return max(marks, key=Mark.ORDER.index) if marks else Mark.NONE


def mark_upper_limit(value, limit, *, warn_fraction=0.5):
    """fail above ``limit``, warn above ``warn_fraction * limit``, else pass ('' if unknown).

    Examples
    --------
    >>> mark_upper_limit(0.01, 0.3), mark_upper_limit(0.2, 0.3), mark_upper_limit(0.4, 0.3)
    ('pass', 'warn', 'fail')
    """
    try:
        value, limit = float(value), float(limit)
    except (TypeError, ValueError):
        return Mark.NONE
    if not (math.isfinite(value) and math.isfinite(limit)):
        return Mark.NONE
    if value > limit:
        return Mark.FAIL
    if value > warn_fraction * limit:
        return Mark.WARN
    return Mark.PASS


def mark_tolerance(measured, configured, tolerance):
    """Measured against configured within a relative ``tolerance``: pass, or warn beyond it
    (the step then keeps the configured value, so the night goes on).

    Examples
    --------
    >>> mark_tolerance(4.02, 4.0, 0.2), mark_tolerance(5.2, 4.0, 0.2)
    ('pass', 'warn')
    """
    try:
        measured, configured, tolerance = float(measured), float(configured), float(tolerance)
    except (TypeError, ValueError):
        return Mark.NONE
    if not all(map(math.isfinite, (measured, configured, tolerance))) or configured == 0:
        return Mark.NONE
    return Mark.PASS if abs(measured / configured - 1.0) <= tolerance else Mark.WARN


def mark_flag(ok, *, bad=Mark.WARN):
    """A recorded yes/no check as a mark."""
    if ok is None or ok is np.ma.masked:
        return Mark.NONE
    if isinstance(ok, str):
        ok = ok.strip().lower() in ("true", "ok", "yes", "1")
    return Mark.PASS if bool(ok) else bad
