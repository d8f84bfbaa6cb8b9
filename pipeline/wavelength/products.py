"""Reader of the wavelength-solution product (what later steps import from this package)."""

from dataclasses import dataclass

import numpy as np

from pipeline.core.errors import InputFileError

__all__ = ["WavelengthMap", "load_wavelength_map"]


@dataclass(frozen=True)
class WavelengthMap:
    """A wavelength solution read back from its FITS file.

    Attributes
    ----------
    wave_angstrom : ndarray, shape (ny, nx), float64, Angstrom (air)
    header : astropy.io.fits.Header
    """

    wave_angstrom: np.ndarray
    header: object

    @property
    def shape(self):
        return self.wave_angstrom.shape


def load_wavelength_map(path):
    """Read the dense wavelength map written by :func:`pipeline.wavelength.steps.solve_wavelength_file`.

    Returns
    -------
    WavelengthMap
        ``.wave_angstrom`` (ny, nx) float64 and the header (fitted tilt ``WSTILT``,
        rms ``WSRMSA``/``WSRMSP``/``WSRMSV``, ``SETUP``, WCS, ...).

    Raises
    ------
    InputFileError
        When the file cannot be read, the PRIMARY HDU is not a 2-D map in Angstrom,
        or the values are not increasing along axis 1.
    """
    from astropy.io import fits

    try:
        with fits.open(path, memmap=False) as hdul:
            header = hdul[0].header.copy()
            data = hdul[0].data
            wave = None if data is None else np.asarray(data, dtype=np.float64)
    except OSError as exc:
        raise InputFileError(path, f"cannot be read as FITS ({exc})") from None
    if wave is None or wave.ndim != 2:
        raise InputFileError(path, "PRIMARY HDU must hold the 2-D wavelength map lambda(y, x); "
                             f"found {None if wave is None else wave.shape}")
    if str(header.get("BUNIT", "")).strip().lower() not in ("angstrom", "a"):
        raise InputFileError(path, f"keyword BUNIT = {header.get('BUNIT')!r}; expected 'Angstrom' "
                             "(a map written by pipeline.wavelength.steps.solve_wavelength_file)")
    row = wave[wave.shape[0] // 2]
    if not np.all(np.isfinite(row)) or np.any(np.diff(row) <= 0):
        raise InputFileError(path, "wavelengths must be finite and increase along axis 1 "
                             "(canonical orientation)")
    return WavelengthMap(wave, header)
