"""The wavelength axis of a science-ready spectrum: velocity frame and medium.

An extracted spectrum has topocentric air wavelengths (the arc and sky line lists are
air). For a science product the pixel edges are converted to vacuum (when configured,
:mod:`pipeline.core.airvac`) and then shifted into the barycentric (or heliocentric)
frame by the correction ``v`` that :func:`pipeline.core.observing.velocity_corrections`
gives at mid-exposure::

    lambda_frame = lambda_topocentric * (1 + v / c)

(``v`` is the correction *added* to a measured radial velocity; to first order in v/c,
which at |v| < 35 km/s is exact to 1e-8, i.e. 0.1 mÅ at 5000 Å, below any long-slit
precision). Header cards follow FITS WCS Paper III (Greisen et al. 2006, A&A 446, 747):
``SPECSYS`` the frame of the axis, ``SSYSOBS`` the frame in which the observation was
constant (topocentric), ``VELOSYS`` the observer's line-of-sight velocity in the SPECSYS
frame (m/s, positive away from the target, so ``VELOSYS = -v``), ``MJD-AVG`` /
``DATE-AVG`` the time it applies to; our own ``VCORR*`` cards give the correction in
km/s, the frame, whether it was applied, and the IERS table used.
"""

from dataclasses import dataclass

import numpy as np

from pipeline.core.airvac import convert_wavelengths
from pipeline.core.constants import SPEED_OF_LIGHT_KM_S

__all__ = ["VELOCITY_FRAMES", "AxisChoice", "frame_edges", "velocity_for_header",
           "velocity_cards", "SPECSYS_OF"]

#: values of ``combine.velocity_frame``
VELOCITY_FRAMES = ("barycentric", "heliocentric", "topocentric")

#: FITS WCS Paper III name of each frame
SPECSYS_OF = {"barycentric": "BARYCENT", "heliocentric": "HELIOCEN", "topocentric": "TOPOCENT"}


@dataclass(frozen=True)
class AxisChoice:
    """How one spectrum's axis was put into the product frame."""

    frame: str               # barycentric, heliocentric or topocentric
    velocity_km_s: float     # correction of that frame at mid-exposure (0 for topocentric)
    barycentric_km_s: float  # both corrections, recorded whatever the frame
    heliocentric_km_s: float
    time_utc: str            # mid-exposure, ISO
    mjd: float
    vacuum: bool
    formula: str
    iers_table: str


def frame_edges(edges_air_angstrom, *, velocity_km_s, vacuum, formula="Ciddor1996"):
    """Pixel edges in the product frame and medium from topocentric air edges.

    Examples
    --------
    >>> e = frame_edges(np.array([5000.0, 5001.0]), velocity_km_s=29.9792458, vacuum=False)
    >>> np.round(e, 6)
    array([5000.5   , 5001.5001])
    """
    edges = convert_wavelengths(edges_air_angstrom, from_vacuum=False, to_vacuum=vacuum,
                                formula=formula)
    return edges * (1.0 + float(velocity_km_s) / SPEED_OF_LIGHT_KM_S)


def velocity_for_header(header, *, site, frame, vacuum, formula="Ciddor1996", path=""):
    """The correction of one spectrum from its header (RA, DEC, EQUINOX, DATE-OBS, EXPTIME)
    and the site, through :mod:`pipeline.core.observing`.

    Raises
    ------
    ValueError
        Naming the file and keyword when the coordinates or time cannot be read.
    """
    from pipeline.core import observing

    if frame not in VELOCITY_FRAMES:
        raise ValueError(f"`frame` must be one of {VELOCITY_FRAMES}, got {frame!r}")
    try:
        coord = observing.parse_coordinates(header.get("RA"), header.get("DEC"),
                                            equinox=header.get("EQUINOX"))
        mid = observing.mid_exposure_time(header.get("DATE-OBS"), header.get("EXPTIME", 0.0))
    except (ValueError, TypeError) as exc:
        raise ValueError(f"{path}: {exc}; needed for the velocity correction") from exc
    corr = observing.velocity_corrections(coord, mid, observing.site_location(site))
    velocity = {"barycentric": corr.barycentric_km_s, "heliocentric": corr.heliocentric_km_s,
                "topocentric": 0.0}[frame]
    return AxisChoice(frame, float(velocity), corr.barycentric_km_s, corr.heliocentric_km_s,
                      corr.time_utc, float(mid.mjd), bool(vacuum), formula, corr.iers_table)


def velocity_cards(choice):
    """Header cards (key, value, comment) of an :class:`AxisChoice`."""
    applied = choice.frame != "topocentric"
    return [
        ("SPECSYS", SPECSYS_OF[choice.frame], "frame of the spectral axis (WCS Paper III)"),
        ("SSYSOBS", "TOPOCENT", "frame in which the observation was constant"),
        ("VELOSYS", round(-1000.0 * choice.velocity_km_s, 3),
         "[m/s] observer velocity in SPECSYS, + = away"),
        ("MJD-AVG", round(choice.mjd, 8), "[d] MJD of mid-exposure (correction time)"),
        ("DATE-AVG", choice.time_utc, "UTC mid-exposure"),
        ("VCORFRM", choice.frame, "velocity frame of the wavelength axis"),
        ("VCORAPP", applied, "velocity correction applied to the axis"),
        ("VCORR", round(choice.velocity_km_s, 6), "[km/s] correction applied (added to RVs)"),
        ("VBARY", round(choice.barycentric_km_s, 6), "[km/s] barycentric correction"),
        ("VHELIO", round(choice.heliocentric_km_s, 6), "[km/s] heliocentric correction"),
        ("VCORIERS", choice.iers_table[:60], "IERS table used"),
        ("AIRVAC", "vacuum" if choice.vacuum else "air", "wavelength medium of the axis"),
        ("AIRVACF", choice.formula, "air dispersion formula (pipeline.core.airvac)"),
    ]
