"""The spectral axis of a rectified frame or a 1-D spectrum: a linear or logarithmic grid of
pixel centres in Angstrom, with its FITS WCS cards (Greisen et al. 2006).

Shared by every step that writes or reads a resampled spectrum (rectification, 1-D products,
coadds), so it lives in the core.
"""

from dataclasses import dataclass

import numpy as np

__all__ = ["WavelengthGrid"]


@dataclass(frozen=True)
class WavelengthGrid:
    """A linear or logarithmic wavelength grid of pixel centres.

    Parameters
    ----------
    start_angstrom : float
        Wavelength of the centre of the first pixel, Angstrom.
    step : float
        Linear grid: pixel width in Angstrom. Logarithmic grid: pixel width in
        natural log of wavelength (dimensionless; velocity step / c).
    n_pix : int
        Number of pixels.
    log : bool
        Logarithmic grid when True.
    vacuum : bool
        Whether the wavelengths are vacuum (``WAVE``) rather than air (``AWAV``).

    Examples
    --------
    >>> g = WavelengthGrid(5000.0, 2.0, 3)
    >>> g.centres_angstrom()
    array([5000., 5002., 5004.])
    """

    start_angstrom: float
    step: float
    n_pix: int
    log: bool = False
    vacuum: bool = False

    def __post_init__(self):
        if not (np.isfinite(self.start_angstrom) and self.start_angstrom > 0):
            raise ValueError(f"`start_angstrom` must be finite and > 0, got {self.start_angstrom}")
        if not (np.isfinite(self.step) and self.step > 0):
            raise ValueError(f"`step` must be finite and > 0, got {self.step}")
        if int(self.n_pix) != self.n_pix or self.n_pix < 1:
            raise ValueError(f"`n_pix` must be a positive integer, got {self.n_pix}")

    def _at(self, index):
        index = np.asarray(index, dtype=np.float64)
        if self.log:
            return self.start_angstrom * np.exp(self.step * index)
        return self.start_angstrom + self.step * index

    def centres_angstrom(self):
        """Pixel-centre wavelengths, Angstrom, shape (n_pix,)."""
        return self._at(np.arange(self.n_pix))

    def edges_angstrom(self):
        """Pixel-edge wavelengths, Angstrom, shape (n_pix + 1,)."""
        return self._at(np.arange(self.n_pix + 1) - 0.5)

    def widths_angstrom(self):
        """Pixel widths, Angstrom, shape (n_pix,)."""
        return np.diff(self.edges_angstrom())

    def pixel_of(self, wave_angstrom):
        """Fractional pixel index (0-based, centres at integers) of wavelengths."""
        wave = np.asarray(wave_angstrom, dtype=np.float64)
        if self.log:
            return np.log(wave / self.start_angstrom) / self.step
        return (wave - self.start_angstrom) / self.step

    @property
    def ctype(self):
        base = "WAVE" if self.vacuum else "AWAV"
        return f"{base}-LOG" if self.log else base

    def wcs_cards(self, axis=1):
        """FITS WCS cards of this grid on image axis ``axis`` (Greisen et al. 2006)."""
        cdelt = self.start_angstrom * self.step if self.log else self.step
        kind = "vacuum" if self.vacuum else "air"
        return [
            (f"CTYPE{axis}", self.ctype, f"{kind} wavelength" + (", log grid" if self.log else "")),
            (f"CUNIT{axis}", "Angstrom", "wavelength unit"),
            (f"CRPIX{axis}", 1.0, "reference pixel (1-based)"),
            (f"CRVAL{axis}", float(self.start_angstrom), "wavelength at CRPIX, Angstrom"),
            (f"CDELT{axis}", float(cdelt),
             "CRVAL*d(ln lambda) per pixel, Angstrom" if self.log else "Angstrom per pixel"),
        ]

    @classmethod
    def from_header(cls, header, axis=1):
        """Read a grid back from the WCS cards written by :meth:`wcs_cards`.

        Raises
        ------
        KeyError, ValueError
            When a card is missing or the axis is not a linear/log wavelength axis.
        """
        ctype = str(header[f"CTYPE{axis}"]).strip().upper()
        if ctype not in ("AWAV", "WAVE", "AWAV-LOG", "WAVE-LOG"):
            raise ValueError(f"CTYPE{axis} = {ctype!r}; expected AWAV, WAVE, AWAV-LOG or WAVE-LOG")
        unit = str(header.get(f"CUNIT{axis}", "Angstrom")).strip()
        if unit not in ("Angstrom", "angstrom", "AA"):
            raise ValueError(f"CUNIT{axis} = {unit!r}; expected 'Angstrom'")
        crpix = float(header.get(f"CRPIX{axis}", 1.0))
        crval = float(header[f"CRVAL{axis}"])
        cdelt = float(header[f"CDELT{axis}"])
        n_pix = int(header[f"NAXIS{axis}"])
        log = ctype.endswith("-LOG")
        if log:
            step = cdelt / crval
            start = crval * np.exp(step * (1.0 - crpix))
        else:
            step = cdelt
            start = crval + cdelt * (1.0 - crpix)
        return cls(float(start), float(step), n_pix, log=log, vacuum=ctype.startswith("WAVE"))
