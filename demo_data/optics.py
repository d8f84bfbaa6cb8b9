"""Geometric optics of the invented Ridgeline Long-Slit Spectrograph (RLS).

This module is the simulator's own model of where light of a given wavelength
lands on the detector. It never imports the reduction pipeline.

Coordinates
-----------
All functions here work in *physical canonical* detector coordinates:
``X`` runs along the dispersion (wavelength increases with ``X``) and ``Y``
along the slit, both in unbinned pixels, with pixel centres at integers
``0 .. n - 1``. A binned canonical pixel ``i`` (binning ``b``) covers
physical pixels ``b*i .. b*i + b - 1`` and has its centre at
``X = b*i + (b - 1)/2``.

Model
-----
The grating equation for a ray leaving the slit at an angle ``gamma`` out of
the dispersion plane reads (e.g. Schroeder, *Astronomical Optics*; from memory)

    m * lambda = d * cos(gamma) * (sin(alpha) + sin(beta)),

with ``d = 1/G``, incidence ``alpha = tilt + D/2`` and diffraction angle on the
camera axis ``beta_c = tilt - D/2`` (``D`` = camera-collimator angle). The
camera maps ``beta`` to the ideal position

    X_ideal = X_c + offset + f_cam * tan(beta - beta_c) / p,

and ``gamma = atan((Y - Y_c) * p / f_cam)``: the ``cos(gamma)`` factor curves
lines along the slit. Two small imperfections follow: a cubic optical
distortion ``X_dist = X_ideal + a3 * u**3`` with ``u = (X_ideal - X_c) / (nx/2)``
and a rigid line tilt (slit/detector rotation) ``X = X_dist + s * (Y - Y_c)``.
A flexure shift ``dX`` moves the whole pattern along ``X``.
"""

from dataclasses import dataclass

import numpy as np

__all__ = ["GratingOptics"]


@dataclass(frozen=True)
class GratingOptics:
    """True optical parameters of one instrument setup.

    Parameters
    ----------
    tilt_deg : float
        True grating tilt (deg), angle between grating normal and the
        bisector of the collimator and camera axes.
    groove_density_per_mm : float
        Grooves per millimetre.
    order : int
        Diffraction order ``m``.
    camera_collimator_angle_deg : float
        Fixed angle ``D`` between the collimator and camera axes (deg).
    camera_focal_length_mm : float
        True camera focal length (mm).
    pixel_size_mm : float
        Unbinned pixel size (mm).
    nx_phys, ny_phys : int
        Unbinned detector size along the dispersion and along the slit.
    detector_offset_px : float
        Position of the camera axis relative to the detector centre along
        ``X`` (unbinned px).
    distortion_a3_px : float
        Amplitude of the cubic distortion term (unbinned px at the detector ends).
    line_tilt_px_per_px : float
        Shear ``dX/dY`` of monochromatic lines (rotation of slit vs detector).
    blaze_wavelength_angstrom : float
        Littrow blaze wavelength of the grating (throughput only).
    """

    tilt_deg: float
    groove_density_per_mm: float = 600.0
    order: int = 1
    camera_collimator_angle_deg: float = 30.0
    camera_focal_length_mm: float = 250.0
    pixel_size_mm: float = 0.015
    nx_phys: int = 2048
    ny_phys: int = 512
    detector_offset_px: float = 0.0
    distortion_a3_px: float = 0.0
    line_tilt_px_per_px: float = 0.0
    blaze_wavelength_angstrom: float = 5500.0

    # -- derived quantities -------------------------------------------------
    @property
    def groove_spacing_angstrom(self):
        """Groove spacing ``d`` (Angstrom)."""
        return 1.0e7 / self.groove_density_per_mm

    @property
    def alpha_rad(self):
        return np.radians(self.tilt_deg + 0.5 * self.camera_collimator_angle_deg)

    @property
    def beta_centre_rad(self):
        return np.radians(self.tilt_deg - 0.5 * self.camera_collimator_angle_deg)

    @property
    def x_centre_px(self):
        """Detector centre along the dispersion, ``(nx - 1)/2`` (unbinned px)."""
        return 0.5 * (self.nx_phys - 1)

    @property
    def y_centre_px(self):
        """Detector centre along the slit, ``(ny - 1)/2`` (unbinned px)."""
        return 0.5 * (self.ny_phys - 1)

    def gamma_rad(self, y_px):
        """Out-of-plane angle of the ray imaged at slit position ``y_px``."""
        return np.arctan((np.asarray(y_px, float) - self.y_centre_px)
                         * self.pixel_size_mm / self.camera_focal_length_mm)

    def anamorphic_factor(self, wave_angstrom):
        """``cos(alpha)/cos(beta)``: slit-image width along X relative to along Y."""
        beta = self.beta_of_wavelength(wave_angstrom, self.y_centre_px)
        return np.cos(self.alpha_rad) / np.cos(beta)

    # -- forward model -------------------------------------------------------
    def beta_of_wavelength(self, wave_angstrom, y_px):
        """Diffraction angle (rad) from the grating equation with ``cos(gamma)``."""
        lam = np.asarray(wave_angstrom, float)
        sin_beta = (self.order * lam / (self.groove_spacing_angstrom * np.cos(self.gamma_rad(y_px)))
                    - np.sin(self.alpha_rad))
        return np.arcsin(sin_beta)

    def _distort(self, x_ideal):
        u = (x_ideal - self.x_centre_px) / (0.5 * self.nx_phys)
        return x_ideal + self.distortion_a3_px * u ** 3

    def _undistort(self, x_dist):
        half = 0.5 * self.nx_phys
        x = np.array(x_dist, dtype=float, copy=True)
        if self.distortion_a3_px == 0.0:
            return x
        for _ in range(30):  # Newton; |a3| << nx so this converges in a few steps
            u = (x - self.x_centre_px) / half
            f = x + self.distortion_a3_px * u ** 3 - x_dist
            fp = 1.0 + 3.0 * self.distortion_a3_px * u ** 2 / half
            step = f / fp
            x -= step
            if np.max(np.abs(step)) < 1e-11:
                break
        return x

    def x_of_wavelength(self, wave_angstrom, y_px, *, flexure_x_px=0.0):
        """Detector position ``X`` (unbinned px) of wavelength(s) at slit row(s) ``y_px``.

        Parameters
        ----------
        wave_angstrom : float or ndarray
            Air wavelength (Angstrom).
        y_px : float or ndarray
            Physical canonical slit coordinate (unbinned px); broadcast with
            ``wave_angstrom``.
        flexure_x_px : float
            Flexure shift of the pattern along X (unbinned px).
        """
        y = np.asarray(y_px, float)
        beta = self.beta_of_wavelength(wave_angstrom, y)
        x_ideal = (self.x_centre_px + self.detector_offset_px
                   + self.camera_focal_length_mm * np.tan(beta - self.beta_centre_rad)
                   / self.pixel_size_mm)
        return (self._distort(x_ideal) + self.line_tilt_px_per_px * (y - self.y_centre_px)
                + flexure_x_px)

    def wavelength_of(self, x_px, y_px, *, flexure_x_px=0.0):
        """Exact air wavelength (Angstrom) at physical canonical position(s) ``(x_px, y_px)``."""
        x = np.asarray(x_px, float)
        y = np.asarray(y_px, float)
        x_dist = x - flexure_x_px - self.line_tilt_px_per_px * (y - self.y_centre_px)
        x_ideal = self._undistort(x_dist)
        beta = self.beta_centre_rad + np.arctan(
            (x_ideal - self.x_centre_px - self.detector_offset_px)
            * self.pixel_size_mm / self.camera_focal_length_mm)
        return (self.groove_spacing_angstrom * np.cos(self.gamma_rad(y))
                * (np.sin(self.alpha_rad) + np.sin(beta)) / self.order)

    def dispersion_angstrom_per_px(self, wave_angstrom, y_px=None):
        """Local reciprocal dispersion ``dlambda/dX`` (Angstrom per unbinned px), numerical."""
        y = self.y_centre_px if y_px is None else y_px
        x = self.x_of_wavelength(wave_angstrom, y)
        h = 0.01
        return (self.wavelength_of(x + h, y) - self.wavelength_of(x - h, y)) / (2 * h)

    def to_dict(self):
        """Parameters as plain floats (for the truth file)."""
        return {
            "tilt_deg": float(self.tilt_deg),
            "groove_density_per_mm": float(self.groove_density_per_mm),
            "order": int(self.order),
            "camera_collimator_angle_deg": float(self.camera_collimator_angle_deg),
            "camera_focal_length_mm": float(self.camera_focal_length_mm),
            "pixel_size_mm": float(self.pixel_size_mm),
            "nx_phys": int(self.nx_phys),
            "ny_phys": int(self.ny_phys),
            "detector_offset_px": float(self.detector_offset_px),
            "distortion_a3_px": float(self.distortion_a3_px),
            "line_tilt_px_per_px": float(self.line_tilt_px_per_px),
            "blaze_wavelength_angstrom": float(self.blaze_wavelength_angstrom),
        }
