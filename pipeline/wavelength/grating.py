"""The physical model of a grating spectrograph: where each wavelength lands.

The model is the grating equation in its general form,

.. math:: m \\lambda = d (\\sin\\alpha + \\sin\\beta), \\qquad d = 1/G,

with angles measured from the grating normal and positive on the side of the
incident beam. The collimator and camera axes make a fixed angle ``D`` (the
camera-collimator angle); rotating the grating by the tilt ``t`` gives

* incidence angle ``alpha = t + D/2``,
* diffraction angle on the camera axis ``beta_c = t - D/2``,
* diffraction angle of pixel ``x``: ``beta(x) = beta_c + atan((x - x_c) p / f)``,

where ``x`` is the pixel coordinate along the dispersion (increasing with
wavelength, 0-based, pixel centres at integers), ``x_c`` the pixel on the
camera axis, ``p`` the binned pixel size and ``f`` the camera focal length.
The inverse (wavelength to pixel) is analytic.

Derived quantities (wavelength coverage, reciprocal linear dispersion,
anamorphic factor, resolving power for a slit and the grating's limit
``R = m N``, the blaze peak, and where light of neighbouring orders lands) are
module-level functions of plain numbers, so they can be checked one by one
against published formulas; :class:`GratingModel` combines them for one
instrument setup. :func:`main` prints a summary for an observer checking a
setup before the night (the ``longslit-grating`` command).

Longer than 500 lines because most of it is the small published formulas, one short
function each with its reference, which read best side by side.

Units: wavelengths in Angstrom (air: the grating works in air, so
``m lambda_air = d (sin alpha + sin beta)`` holds exactly for air
wavelengths), angles in degrees at the interface, lengths in mm, pixel sizes
in micrometres.

References
----------
Greisen, E. W., Calabretta, M. R., Valdes, F. G., & Allen, S. L. 2006, A&A
446, 747 (spectral coordinates in FITS; the grating algorithm in air, ``-GRA``,
written by :func:`grating_wcs_cards`).
"""

import argparse
import math
import sys
import warnings
from dataclasses import dataclass, field, replace

import numpy as np

from pipeline.core.errors import ConfigError, OrderOverlapWarning

__all__ = [
    "groove_spacing_angstrom", "diffraction_angle_deg", "grating_wavelength",
    "angular_dispersion_rad_per_angstrom", "reciprocal_linear_dispersion",
    "littrow_angle_deg", "grating_resolving_power", "blaze_wavelength",
    "free_spectral_range", "order_at_blaze", "GratingModel", "OrderOverlap",
    "SetupSummary", "model_from_config", "order_overlaps", "summarize_setup",
    "format_summary", "grating_wcs_cards", "filter_cut_on", "main",
]

#: Shortest wavelength assumed to reach the detector through atmosphere and
#: optics when checking order overlap (common practice: the atmospheric
#: ozone cut-off lies near 3000-3200 A).
DEFAULT_BLUE_LIMIT_ANGSTROM = 3200.0
#: Longest wavelength a silicon CCD records (common practice: ~1.1 um band gap).
DEFAULT_RED_LIMIT_ANGSTROM = 11000.0

_MM_TO_ANGSTROM = 1.0e7


# --------------------------------------------------------------------------------------
# argument coercers
# --------------------------------------------------------------------------------------

def _positive(value, name):
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"`{name}` must be a number > 0, got {value!r}") from None
    if not math.isfinite(number) or number <= 0:
        raise ValueError(f"`{name}` must be a finite number > 0, got {value!r}")
    return number


def _order(value, name="order"):
    if isinstance(value, bool) or int(value) != value:
        raise ValueError(f"`{name}` must be an integer, got {value!r}")
    return int(value)


# --------------------------------------------------------------------------------------
# the grating equation and its derivatives (plain numbers or arrays)
# --------------------------------------------------------------------------------------

def groove_spacing_angstrom(groove_density_per_mm):
    """Groove spacing ``d = 1/G`` in Angstrom for ``G`` grooves per mm."""
    return _MM_TO_ANGSTROM / _positive(groove_density_per_mm, "groove_density_per_mm")


def diffraction_angle_deg(wave_angstrom, alpha_deg, *, groove_density_per_mm, order=1):
    """Diffraction angle ``beta`` from ``m lambda = d (sin alpha + sin beta)``.

    Parameters
    ----------
    wave_angstrom : float or ndarray, Angstrom
    alpha_deg : float, deg
        Angle of incidence from the grating normal.
    groove_density_per_mm : float, 1/mm
    order : int

    Returns
    -------
    float or ndarray, deg
        ``nan`` where ``|sin beta| > 1`` (the order does not exist there).
    """
    d = groove_spacing_angstrom(groove_density_per_mm)
    sin_beta = order * np.asarray(wave_angstrom, dtype=float) / d - np.sin(np.radians(alpha_deg))
    with np.errstate(invalid="ignore"):
        beta = np.degrees(np.arcsin(np.where(np.abs(sin_beta) <= 1, sin_beta, np.nan)))
    return beta[()] if beta.ndim == 0 else beta


def grating_wavelength(alpha_deg, beta_deg, *, groove_density_per_mm, order=1):
    """Wavelength ``lambda = d (sin alpha + sin beta) / m`` in Angstrom."""
    d = groove_spacing_angstrom(groove_density_per_mm)
    return d * (np.sin(np.radians(alpha_deg)) + np.sin(np.radians(beta_deg))) / order


def angular_dispersion_rad_per_angstrom(beta_deg, *, groove_density_per_mm, order=1):
    """Angular dispersion ``d beta / d lambda = m / (d cos beta)`` in rad per Angstrom."""
    d = groove_spacing_angstrom(groove_density_per_mm)
    return order / (d * np.cos(np.radians(beta_deg)))


def reciprocal_linear_dispersion(beta_deg, *, groove_density_per_mm, order=1,
                                 focal_length_mm):
    """Reciprocal linear dispersion ``d lambda / dx = d cos beta / (m f)`` in Angstrom per mm.

    This is the value on the camera axis; off axis the flat detector adds a
    factor ``cos^2(beta - beta_c)`` (see :meth:`GratingModel.dispersion`).
    """
    d = groove_spacing_angstrom(groove_density_per_mm)
    return d * np.cos(np.radians(beta_deg)) / (order * _positive(focal_length_mm, "focal_length_mm"))


def littrow_angle_deg(wave_angstrom, *, groove_density_per_mm, order=1):
    """Littrow angle (``alpha = beta``) from ``m lambda = 2 d sin(theta_L)``, in deg."""
    d = groove_spacing_angstrom(groove_density_per_mm)
    return np.degrees(np.arcsin(order * np.asarray(wave_angstrom, dtype=float) / (2 * d)))


def grating_resolving_power(*, groove_density_per_mm, order=1, illuminated_width_mm):
    """Theoretical limit ``R = m N`` with ``N = G W`` illuminated grooves.

    Equivalently ``R = W (sin alpha + sin beta) / lambda``.
    """
    return abs(order) * _positive(groove_density_per_mm, "groove_density_per_mm") * _positive(
        illuminated_width_mm, "illuminated_width_mm")


def blaze_wavelength(blaze_angle_deg, *, groove_density_per_mm, order=1, deviation_deg=0.0):
    """Wavelength of peak blaze efficiency, in Angstrom.

    ``lambda_B = 2 d sin(theta_B) cos(D/2) / m`` for a fixed deviation
    ``D = alpha - beta`` with the facets at the mirror angle
    (``alpha = theta_B + D/2``, ``beta = theta_B - D/2``); ``D = 0`` is Littrow.
    """
    d = groove_spacing_angstrom(groove_density_per_mm)
    return (2 * d * np.sin(np.radians(blaze_angle_deg)) * np.cos(np.radians(deviation_deg) / 2)
            / order)


def free_spectral_range(wave_angstrom, *, order):
    """Free spectral range ``lambda / m`` in Angstrom of order ``m`` starting at ``lambda``.

    Order ``m`` is free of order ``m + 1`` from ``lambda`` to ``lambda (m + 1) / m``.
    """
    return np.asarray(wave_angstrom, dtype=float) / _order(order)


def order_at_blaze(wave_angstrom, *, groove_density_per_mm, blaze_angle_deg):
    """(Non-integer) Littrow order whose blaze peak is at ``wave_angstrom``: ``2 d sin(theta_B) / lambda``."""
    d = groove_spacing_angstrom(groove_density_per_mm)
    return 2 * d * np.sin(np.radians(blaze_angle_deg)) / np.asarray(wave_angstrom, dtype=float)


# --------------------------------------------------------------------------------------
# the spectrograph model
# --------------------------------------------------------------------------------------

@dataclass(frozen=True)
class GratingModel:
    """A grating spectrograph with a flat detector behind a camera lens.

    Parameters
    ----------
    groove_density_per_mm : float, 1/mm
        Grooves per mm (``G``; ``d = 1/G``).
    order : int
        Diffraction order ``m`` (the sign convention makes ``m > 0`` the usual case).
    camera_collimator_angle_deg : float, deg
        Fixed angle ``D`` between collimator and camera axes.
    tilt_deg : float, deg
        Grating tilt ``t``: ``alpha = t + D/2``, ``beta_c = t - D/2``.
    focal_length_mm : float, mm
        Camera focal length ``f``.
    pixel_size_um : float, um
        Unbinned pixel size along the dispersion.
    binning : int
        Binning along the dispersion; the model works in binned pixels.
    center_px : float, binned px
        Pixel (0-based) on the camera axis.

    Examples
    --------
    >>> g = GratingModel(600, 1, 30.0, 8.93, 250.0, 15.0, binning=2, center_px=511.5)
    >>> round(float(g.wavelength(511.5)), 2)
    4997.95
    >>> round(float(g.pixel(g.wavelength(100.0))), 9)
    100.0
    """

    groove_density_per_mm: float
    order: int
    camera_collimator_angle_deg: float
    tilt_deg: float
    focal_length_mm: float
    pixel_size_um: float
    binning: int = 1
    center_px: float = 0.0

    def __post_init__(self):
        _positive(self.groove_density_per_mm, "groove_density_per_mm")
        if _order(self.order) == 0:
            raise ValueError("`order` must be a non-zero integer, got 0")
        _positive(self.focal_length_mm, "focal_length_mm")
        _positive(self.pixel_size_um, "pixel_size_um")
        if _order(self.binning, "binning") < 1:
            raise ValueError(f"`binning` must be an integer >= 1, got {self.binning!r}")
        for name in ("camera_collimator_angle_deg", "tilt_deg", "center_px"):
            if not math.isfinite(float(getattr(self, name))):
                raise ValueError(f"`{name}` must be finite, got {getattr(self, name)!r}")

    # basic geometry -----------------------------------------------------------------
    @property
    def groove_spacing_angstrom(self):
        """``d`` in Angstrom."""
        return groove_spacing_angstrom(self.groove_density_per_mm)

    @property
    def pixel_mm(self):
        """Binned pixel size in mm."""
        return self.pixel_size_um * 1e-3 * self.binning

    @property
    def alpha_deg(self):
        """Angle of incidence in deg."""
        return self.tilt_deg + self.camera_collimator_angle_deg / 2

    @property
    def beta_center_deg(self):
        """Diffraction angle on the camera axis in deg."""
        return self.tilt_deg - self.camera_collimator_angle_deg / 2

    def with_changes(self, **changes):
        """Return a copy with some parameters replaced."""
        return replace(self, **changes)

    def beta_rad(self, x_px):
        """Diffraction angle (rad) of the ray reaching binned pixel ``x_px``."""
        x = np.asarray(x_px, dtype=float)
        return np.radians(self.beta_center_deg) + np.arctan(
            (x - self.center_px) * self.pixel_mm / self.focal_length_mm)

    # forward and inverse ------------------------------------------------------------
    def wavelength(self, x_px):
        """Wavelength (Angstrom) at binned pixel ``x_px`` (float or ndarray)."""
        beta = self.beta_rad(x_px)
        return self.groove_spacing_angstrom * (
            math.sin(math.radians(self.alpha_deg)) + np.sin(beta)) / self.order

    def pixel(self, wave_angstrom):
        """Binned pixel (float) where ``wave_angstrom`` lands; ``nan`` if it cannot be diffracted."""
        wave = np.asarray(wave_angstrom, dtype=float)
        sin_beta = self.order * wave / self.groove_spacing_angstrom - math.sin(
            math.radians(self.alpha_deg))
        with np.errstate(invalid="ignore"):
            beta = np.arcsin(np.where(np.abs(sin_beta) <= 1, sin_beta, np.nan))
            gamma = beta - math.radians(self.beta_center_deg)
            gamma = np.where(np.abs(gamma) < math.pi / 2, gamma, np.nan)
        return self.center_px + self.focal_length_mm / self.pixel_mm * np.tan(gamma)

    def dispersion(self, x_px):
        """Reciprocal linear dispersion ``d lambda / dx`` in Angstrom per binned pixel."""
        beta = self.beta_rad(x_px)
        gamma = beta - math.radians(self.beta_center_deg)
        return (self.groove_spacing_angstrom * np.cos(beta) * np.cos(gamma) ** 2
                * self.pixel_mm / (self.order * self.focal_length_mm))

    def anamorphic_factor(self, x_px):
        """Anamorphic magnification ``cos(alpha) / cos(beta)`` of the slit width at ``x_px``."""
        return math.cos(math.radians(self.alpha_deg)) / np.cos(self.beta_rad(x_px))

    def coverage(self, nx_px):
        """Wavelengths (Angstrom) at the outer edges of pixels 0 and ``nx_px - 1``."""
        edges = self.wavelength(np.array([-0.5, nx_px - 0.5]))
        return float(edges.min()), float(edges.max())

    def other_order_wavelength(self, x_px, order):
        """Wavelength of order ``order`` reaching ``x_px``: ``lambda_m m / order``."""
        return self.wavelength(x_px) * self.order / order

    def slit_width_px(self, x_px, *, slit_width_arcsec, spatial_scale_arcsec_per_px):
        """Width of the slit image along the dispersion, in binned pixels.

        The spatial scale is given for unbinned pixels along the slit; along the
        dispersion the slit image is magnified by the anamorphic factor.
        """
        width_unbinned = (_positive(slit_width_arcsec, "slit_width_arcsec")
                          / _positive(spatial_scale_arcsec_per_px, "spatial_scale_arcsec_per_px"))
        return width_unbinned * self.anamorphic_factor(x_px) / self.binning

    def resolving_power(self, x_px, *, slit_width_arcsec, spatial_scale_arcsec_per_px):
        """Slit-limited resolving power ``lambda / (w_slit d lambda/dx)`` at ``x_px``."""
        width = self.slit_width_px(x_px, slit_width_arcsec=slit_width_arcsec,
                                   spatial_scale_arcsec_per_px=spatial_scale_arcsec_per_px)
        return self.wavelength(x_px) / (width * self.dispersion(x_px))

    def blaze_peak_wavelength(self, blaze_wavelength_littrow_angstrom):
        """Wavelength of peak blaze efficiency in this geometry, in Angstrom.

        ``blaze_wavelength_littrow_angstrom`` is the first-order Littrow blaze
        wavelength quoted by the maker; it gives the blaze angle
        ``theta_B = asin(lambda_B / (2 d))``. The facets reflect specularly
        when ``alpha + beta = 2 theta_B``, so the peak is at
        ``2 d sin(theta_B) cos(alpha - theta_B) / m``.
        """
        d = self.groove_spacing_angstrom
        theta_b = math.asin(_positive(blaze_wavelength_littrow_angstrom,
                                      "blaze_wavelength_littrow_angstrom") / (2 * d))
        return 2 * d * math.sin(theta_b) * math.cos(math.radians(self.alpha_deg) - theta_b) / self.order


def model_from_config(grating, *, tilt_deg, binning=1, nx_px=None):
    """Build the nominal model from the config section ``instrument.grating``.

    Parameters
    ----------
    grating : dict
        ``groove_density_per_mm``, ``order``, ``camera_collimator_angle_deg``,
        ``camera_focal_length_mm``, ``pixel_size_um`` and optionally
        ``detector_center_px`` (unbinned, 0-based; null = detector centre).
    tilt_deg : float, deg
        Grating tilt (from the header).
    binning : int
        Binning along the dispersion.
    nx_px : int, optional
        Number of binned pixels along the dispersion; the camera axis defaults to
        ``(nx_px - 1) / 2``.

    Raises
    ------
    ConfigError
        When a required key is missing or a value is out of range.
    """
    needed = ("groove_density_per_mm", "order", "camera_collimator_angle_deg",
              "camera_focal_length_mm", "pixel_size_um")
    missing = [k for k in needed if grating.get(k) is None]
    if missing:
        raise ConfigError(f"instrument.grating: missing {', '.join(missing)}; "
                          "expected the nominal optics (see config/schema.yaml)")
    center_unbinned = grating.get("detector_center_px")
    if center_unbinned is not None:
        center = (float(center_unbinned) + 0.5) / binning - 0.5
    elif nx_px is not None:
        center = (nx_px - 1) / 2
    else:
        raise ConfigError("instrument.grating.detector_center_px is null and the number of "
                          "pixels along the dispersion is not known; give one of them")
    try:
        return GratingModel(
            groove_density_per_mm=float(grating["groove_density_per_mm"]),
            order=int(grating["order"]),
            camera_collimator_angle_deg=float(grating["camera_collimator_angle_deg"]),
            tilt_deg=float(tilt_deg),
            focal_length_mm=float(grating["camera_focal_length_mm"]),
            pixel_size_um=float(grating["pixel_size_um"]),
            binning=int(binning),
            center_px=float(center),
        )
    except ValueError as exc:
        raise ConfigError(f"instrument.grating: {exc}") from None


# --------------------------------------------------------------------------------------
# order overlap
# --------------------------------------------------------------------------------------

@dataclass(frozen=True)
class OrderOverlap:
    """Light of another order landing on the detector.

    Attributes
    ----------
    order : int
        The other order (``m - 1``, ``m + 1``; 0 is the undispersed image).
    x_range_px : (float, float)
        Binned pixels receiving light of that order that can reach the
        detector (after the filter and the blue/red limits); ``(nan, nan)`` if none.
    wave_range_angstrom : (float, float)
        Wavelengths of that light (order ``order``).
    contaminated_range_angstrom : (float, float)
        First-order (``m``) wavelengths of the contaminated pixels.
    blocked : bool
        True when the configured filter removes all of it.
    """

    order: int
    x_range_px: tuple
    wave_range_angstrom: tuple
    contaminated_range_angstrom: tuple
    blocked: bool


def order_overlaps(model, nx_px, *, cut_on_angstrom=None,
                   blue_limit_angstrom=DEFAULT_BLUE_LIMIT_ANGSTROM,
                   red_limit_angstrom=DEFAULT_RED_LIMIT_ANGSTROM):
    """Where light of orders ``m - 1`` and ``m + 1`` (and order 0) falls on the detector.

    Light of order ``k`` at a pixel where order ``m`` has wavelength
    ``lambda`` has wavelength ``lambda m / k``. It contaminates the spectrum
    when that wavelength reaches the detector: above ``blue_limit_angstrom``
    (atmosphere and optics), below ``red_limit_angstrom`` (the detector) and
    above the order-blocking filter's cut-on ``cut_on_angstrom`` (None = no
    filter).

    Parameters
    ----------
    model : GratingModel
    nx_px : int
        Binned pixels along the dispersion.
    cut_on_angstrom : float or None, Angstrom
    blue_limit_angstrom, red_limit_angstrom : float, Angstrom

    Returns
    -------
    list of OrderOverlap
        One entry per order that lands on the detector inside its wavelength
        limits, before the filter (``blocked`` tells whether the filter removes it).
    """
    x = np.linspace(-0.5, nx_px - 0.5, 4 * int(nx_px) + 1)
    wave_m = model.wavelength(x)
    results = []
    m = model.order
    sign = 1 if m > 0 else -1
    for k in (m - sign, m + sign):
        if k == 0:
            # undispersed light: specular reflection, beta = -alpha
            x0 = float(model.pixel(0.0)) if np.isfinite(model.pixel(0.0)) else math.nan
            if -0.5 <= x0 <= nx_px - 0.5:
                results.append(OrderOverlap(0, (x0, x0), (math.nan, math.nan),
                                            (float(model.wavelength(x0)),) * 2, False))
            continue
        wave_k = wave_m * m / k
        reach = (wave_k >= blue_limit_angstrom) & (wave_k <= red_limit_angstrom)
        if not reach.any():
            continue
        passed = reach & (wave_k >= cut_on_angstrom if cut_on_angstrom is not None else True)
        sel = passed if passed.any() else reach
        results.append(OrderOverlap(
            order=int(k),
            x_range_px=(float(x[sel].min()), float(x[sel].max())),
            wave_range_angstrom=(float(wave_k[sel].min()), float(wave_k[sel].max())),
            contaminated_range_angstrom=(float(wave_m[sel].min()), float(wave_m[sel].max())),
            blocked=not passed.any(),
        ))
    return results


# --------------------------------------------------------------------------------------
# setup summary and command line
# --------------------------------------------------------------------------------------

@dataclass(frozen=True)
class SetupSummary:
    """What an observer checks about a setup before the night.

    All wavelengths in Angstrom; dispersions in Angstrom per binned pixel.
    """

    model: GratingModel
    nx_px: int
    coverage_angstrom: tuple
    central_wavelength_angstrom: float
    dispersion_angstrom_per_px: tuple      # (first pixel, centre, last pixel)
    anamorphic_factor: tuple               # (first pixel, centre, last pixel)
    slit_width_arcsec: float
    slit_width_px: float                   # at the centre, binned
    resolving_power: tuple                 # (first pixel, centre, last pixel), slit-limited
    grating_limit_resolving_power: float
    blaze_peak_angstrom: float
    filter_name: str
    cut_on_angstrom: float
    overlaps: tuple
    info: dict = field(default_factory=dict)

    @property
    def unblocked_overlaps(self):
        """Orders whose light reaches the detector past the filter."""
        return tuple(o for o in self.overlaps if not o.blocked)


def summarize_setup(model, nx_px, *, slit_width_arcsec=1.0, spatial_scale_arcsec_per_px=None,
                    illuminated_width_mm=None, blaze_wavelength_angstrom=None,
                    filter_name="NONE", cut_on_angstrom=None,
                    blue_limit_angstrom=DEFAULT_BLUE_LIMIT_ANGSTROM,
                    red_limit_angstrom=DEFAULT_RED_LIMIT_ANGSTROM, warn=True):
    """Derived quantities of one setup; warns when another order reaches the detector.

    Parameters
    ----------
    model : GratingModel
    nx_px : int
        Binned pixels along the dispersion.
    slit_width_arcsec : float, arcsec
    spatial_scale_arcsec_per_px : float or None, arcsec per unbinned pixel
        Needed for the slit-limited resolving power (nan without it).
    illuminated_width_mm : float or None, mm
        Grating width illuminated along the dispersion, for ``R = m N``.
    blaze_wavelength_angstrom : float or None, Angstrom
        First-order Littrow blaze wavelength.
    filter_name : str
    cut_on_angstrom : float or None, Angstrom
        Cut-on of the order-blocking filter (None = no blocking).
    warn : bool
        Issue :class:`~pipeline.core.errors.OrderOverlapWarning` for unblocked overlaps.

    Returns
    -------
    SetupSummary
    """
    nx_px = int(nx_px)
    if nx_px < 2:
        raise ValueError(f"`nx_px` must be >= 2 pixels, got {nx_px!r}")
    xs = np.array([0.0, (nx_px - 1) / 2, nx_px - 1.0])
    if spatial_scale_arcsec_per_px:
        rp = tuple(float(v) for v in model.resolving_power(
            xs, slit_width_arcsec=slit_width_arcsec,
            spatial_scale_arcsec_per_px=spatial_scale_arcsec_per_px))
        width = float(model.slit_width_px(xs[1], slit_width_arcsec=slit_width_arcsec,
                                          spatial_scale_arcsec_per_px=spatial_scale_arcsec_per_px))
    else:
        rp, width = (math.nan,) * 3, math.nan
    limit = (grating_resolving_power(groove_density_per_mm=model.groove_density_per_mm,
                                     order=model.order, illuminated_width_mm=illuminated_width_mm)
             if illuminated_width_mm else math.nan)
    blaze = (model.blaze_peak_wavelength(blaze_wavelength_angstrom)
             if blaze_wavelength_angstrom else math.nan)
    overlaps = tuple(order_overlaps(model, nx_px, cut_on_angstrom=cut_on_angstrom,
                                    blue_limit_angstrom=blue_limit_angstrom,
                                    red_limit_angstrom=red_limit_angstrom))
    summary = SetupSummary(
        model=model, nx_px=nx_px, coverage_angstrom=model.coverage(nx_px),
        central_wavelength_angstrom=float(model.wavelength(xs[1])),
        dispersion_angstrom_per_px=tuple(float(v) for v in model.dispersion(xs)),
        anamorphic_factor=tuple(float(v) for v in model.anamorphic_factor(xs)),
        slit_width_arcsec=float(slit_width_arcsec), slit_width_px=width, resolving_power=rp,
        grating_limit_resolving_power=float(limit), blaze_peak_angstrom=float(blaze),
        filter_name=str(filter_name),
        cut_on_angstrom=math.nan if cut_on_angstrom is None else float(cut_on_angstrom),
        overlaps=overlaps,
        info={"blue_limit_angstrom": blue_limit_angstrom, "red_limit_angstrom": red_limit_angstrom},
    )
    if warn:
        for o in summary.unblocked_overlaps:
            warnings.warn(_overlap_text(o, summary), OrderOverlapWarning, stacklevel=2)
    return summary


def _overlap_text(o, summary):
    if o.order == 0:
        return (f"the undispersed (order 0) image falls on the detector at pixel "
                f"{o.x_range_px[0]:.0f}")
    filt = (f"filter {summary.filter_name} (cut-on {summary.cut_on_angstrom:.0f} A)"
            if math.isfinite(summary.cut_on_angstrom) else
            f"no order-blocking filter (FILTER = {summary.filter_name!r})")
    return (f"order {o.order} light at {o.wave_range_angstrom[0]:.0f}-{o.wave_range_angstrom[1]:.0f} A "
            f"falls on pixels {o.x_range_px[0]:.0f}-{o.x_range_px[1]:.0f}, on top of order "
            f"{summary.model.order} {o.contaminated_range_angstrom[0]:.0f}-"
            f"{o.contaminated_range_angstrom[1]:.0f} A, with {filt}")


def format_summary(summary):
    """Human-readable text of a :class:`SetupSummary`."""
    g = summary.model
    lo, hi = summary.coverage_angstrom
    d0, dc, d1 = summary.dispersion_angstrom_per_px
    a0, ac, a1 = summary.anamorphic_factor
    r0, rc, r1 = summary.resolving_power
    lines = [
        f"grating {g.groove_density_per_mm:g}/mm, order {g.order}, tilt {g.tilt_deg:.3f} deg, "
        f"camera-collimator angle {g.camera_collimator_angle_deg:g} deg",
        f"  incidence alpha {g.alpha_deg:.3f} deg, diffraction on the camera axis beta "
        f"{g.beta_center_deg:.3f} deg",
        f"  camera f = {g.focal_length_mm:g} mm, pixel {g.pixel_size_um:g} um x binning "
        f"{g.binning}, {summary.nx_px} pixels, camera axis at pixel {g.center_px:.1f}",
        f"coverage             {lo:9.1f} - {hi:9.1f} A (centre {summary.central_wavelength_angstrom:.1f} A)",
        f"dispersion           {d0:.4f} / {dc:.4f} / {d1:.4f} A/px (first / centre / last pixel)",
        f"anamorphic factor    {a0:.4f} / {ac:.4f} / {a1:.4f} (cos alpha / cos beta)",
        f"slit                 {summary.slit_width_arcsec:g} arcsec = {summary.slit_width_px:.2f} px "
        "along the dispersion at the centre",
        f"resolving power      {r0:.0f} / {rc:.0f} / {r1:.0f} (slit-limited, first / centre / last pixel)",
        f"grating limit R = mN {summary.grating_limit_resolving_power:.0f}",
        f"blaze peak           {summary.blaze_peak_angstrom:.0f} A in this geometry",
    ]
    if not summary.overlaps:
        lines.append("order overlap        none: no other order reaches the detector within "
                     f"{summary.info['blue_limit_angstrom']:.0f}-{summary.info['red_limit_angstrom']:.0f} A")
    for o in summary.overlaps:
        state = "blocked by the filter" if o.blocked else "WARNING: not blocked"
        lines.append(f"order overlap        {_overlap_text(o, summary)} -> {state}")
    return "\n".join(lines)


def grating_wcs_cards(model, *, axis=1, reference_px=None):
    """FITS WCS cards (Greisen et al. 2006, ``AWAV-GRA``) of the model along the dispersion.

    The reference pixel is the camera axis (``PV_6 = 0``), where the grating
    algorithm and this model coincide in form. The algorithm code ``GRA`` is
    the grating equation applied to air wavelengths, as this model does
    (``GRI`` would apply it in vacuum; WCSLIB's ``spc.h`` documents both), so
    astropy.wcs reproduces :meth:`GratingModel.wavelength` to rounding error
    (tests/test_grating.py).

    Parameters
    ----------
    model : GratingModel
    axis : int
        FITS axis number of the dispersion (1 for canonical frames).
    reference_px : float, optional
        0-based reference pixel (default: the camera axis).

    Returns
    -------
    list of (keyword, value, comment)
    """
    xr = model.center_px if reference_px is None else float(reference_px)
    beta_r = float(model.beta_rad(xr))
    theta = math.degrees(math.radians(model.beta_center_deg) - beta_r)
    i = int(axis)
    return [
        (f"CTYPE{i}", "AWAV-GRA", "air wavelength, grating in air (Greisen+ 2006)"),
        (f"CUNIT{i}", "Angstrom", "unit of CRVAL and CDELT"),
        (f"CRPIX{i}", xr + 1.0, "reference pixel (1-based)"),
        (f"CRVAL{i}", float(model.wavelength(xr)), "[Angstrom] wavelength at CRPIX"),
        (f"CDELT{i}", float(model.dispersion(xr)), "[Angstrom/px] dispersion at CRPIX"),
        (f"PV{i}_0", model.groove_density_per_mm * 1e3, "[1/m] grooves per metre"),
        (f"PV{i}_1", float(model.order), "diffraction order"),
        (f"PV{i}_2", model.alpha_deg, "[deg] angle of incidence"),
        (f"PV{i}_6", theta, "[deg] camera axis minus reference ray angle"),
    ]


def filter_cut_on(grating, filter_name):
    """Cut-on wavelength (Angstrom) of ``filter_name`` from ``instrument.grating.order_blocking_filters``.

    Names compare case-insensitively; None when the filter is unknown or blocks nothing.
    """
    filters = grating.get("order_blocking_filters") or {}
    if filter_name is None:
        return None
    for name, value in filters.items():
        if str(name).strip().upper() == str(filter_name).strip().upper():
            return None if value is None else float(value)
    return None


def main(argv=None):
    """Print the derived quantities of a setup (the ``longslit-grating`` command).

    Examples
    --------
    ``longslit-grating --config config/instruments/rls.yaml --tilt 11.83 --binning 2 --filter GG495``
    """
    import yaml

    parser = argparse.ArgumentParser(
        prog="longslit-grating",
        description="Check a grating setup before the night: coverage, dispersion, anamorphic "
                    "factor, resolving power and order overlap from the nominal optics in a config.")
    parser.add_argument("--config", default="config/instruments/rls.yaml",
                        help="instrument file (or config) with an instrument: section "
                             "(default %(default)s)")
    parser.add_argument("--tilt", type=float, required=True, help="grating tilt in degrees")
    parser.add_argument("--binning", type=int, default=1, help="binning along the dispersion")
    parser.add_argument("--filter", default="NONE", help="FILTER value (order-blocking filter)")
    parser.add_argument("--slit", type=float, default=1.0, help="slit width in arcsec")
    parser.add_argument("--pixels", type=int, default=None,
                        help="unbinned detector pixels along the dispersion (default: "
                             "instrument.grating.detector_pixels_dispersion)")
    parser.add_argument("--blue-limit", type=float, default=DEFAULT_BLUE_LIMIT_ANGSTROM,
                        help="shortest wavelength reaching the detector, for order overlap "
                             "(default %(default)s A)")
    args = parser.parse_args(argv)

    try:
        with open(args.config) as stream:
            config = yaml.safe_load(stream) or {}
    except OSError as exc:
        parser.error(f"cannot read --config {args.config}: {exc}")
    instrument = config.get("instrument") or {}
    grating = instrument.get("grating")
    if not grating:
        parser.error(f"{args.config}: no instrument.grating section")
    pixels = args.pixels or grating.get("detector_pixels_dispersion")
    if not pixels:
        parser.error(f"{args.config}: instrument.grating.detector_pixels_dispersion is not set; "
                     "give --pixels N (unbinned pixels along the dispersion)")
    if args.binning < 1:
        parser.error(f"--binning must be >= 1, got {args.binning}")
    nx = int(pixels) // args.binning
    try:
        model = model_from_config(grating, tilt_deg=args.tilt, binning=args.binning, nx_px=nx)
    except ConfigError as exc:
        parser.error(f"{args.config}: {exc}")
    known = {str(k).upper() for k in (grating.get("order_blocking_filters") or {})}
    if args.filter.upper() not in known:
        print(f"note: filter {args.filter!r} is not in instrument.grating.order_blocking_filters "
              f"({', '.join(sorted(known)) or 'none'}); assuming it blocks nothing", file=sys.stderr)
    summary = summarize_setup(
        model, nx, slit_width_arcsec=args.slit,
        spatial_scale_arcsec_per_px=instrument.get("spatial_scale_arcsec_per_px"),
        illuminated_width_mm=grating.get("collimated_beam_mm"),
        blaze_wavelength_angstrom=grating.get("blaze_wavelength_angstrom"),
        filter_name=args.filter, cut_on_angstrom=filter_cut_on(grating, args.filter),
        blue_limit_angstrom=args.blue_limit, warn=False)
    print(format_summary(summary))
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
