"""Air and vacuum wavelengths: the refractive index of standard air and the conversions.

Two published dispersion formulas for standard dry air (15 °C, 101.325 kPa), in
terms of the vacuum wavenumber ``sigma = 1e4 / lambda_vac`` (1/µm):

* ``"Ciddor1996"`` (default): Ciddor, P. E. 1996, "Refractive index of air: new
  equations for the visible and near infrared", Applied Optics 35, 1566, eq. 1
  (standard air with 450 ppm CO2)::

      n - 1 = 0.05792105 / (238.0185 - sigma**2) + 0.00167917 / (57.362 - sigma**2)

* ``"Morton2000"``: the IAU standard conversion as given by Morton, D. C. 2000,
  ApJS 130, 403, eq. 8 (the Edlén form with the coefficients of Birch & Downs 1994)::

      n - 1 = 8.34254e-5 + 2.406147e-2 / (130 - sigma**2) + 1.5998e-4 / (38.9 - sigma**2)

Between 3000 and 10000 Å the two give air wavelengths within 0.2 mÅ of each
other, far below any long-slit resolution; a product names the one used
(header ``AIRVACF``). Air to vacuum inverts ``lambda_air = lambda_vac / n(lambda_vac)``
by fixed-point iteration (converged to < 1e-9 Å in three steps).

Examples
--------
>>> round(float(5000.0 - vacuum_to_air(5000.0)), 4)
1.3945
>>> round(float(vacuum_to_air(air_to_vacuum(6562.8))), 9)
6562.8
"""

import numpy as np

__all__ = ["FORMULAS", "refractive_index", "vacuum_to_air", "air_to_vacuum",
           "convert_wavelengths"]

#: names of the dispersion formulas this module knows
FORMULAS = ("Ciddor1996", "Morton2000")

#: a formula is valid over these vacuum wavelengths (Angstrom); beyond, the
#: functions raise rather than extrapolate silently
_VALID_ANGSTROM = (2000.0, 25000.0)


def _sigma2(wave_vac_angstrom):
    wave = np.asarray(wave_vac_angstrom, dtype=np.float64)
    finite = wave[np.isfinite(wave)]
    if finite.size and (finite.min() < _VALID_ANGSTROM[0] or finite.max() > _VALID_ANGSTROM[1]):
        raise ValueError(f"wavelengths must lie within {_VALID_ANGSTROM[0]:.0f}-"
                         f"{_VALID_ANGSTROM[1]:.0f} Angstrom for the air dispersion formulas, "
                         f"got {finite.min():.6g}-{finite.max():.6g}")
    return (1e4 / wave) ** 2


def refractive_index(wave_vac_angstrom, *, formula="Ciddor1996"):
    """Refractive index of standard dry air at vacuum wavelengths.

    Parameters
    ----------
    wave_vac_angstrom : float or ndarray, Angstrom
        Vacuum wavelengths, 2000-25000 Å.
    formula : {'Ciddor1996', 'Morton2000'}

    Returns
    -------
    ndarray or float
        ``n`` (dimensionless, > 1).
    """
    s2 = _sigma2(wave_vac_angstrom)
    if formula == "Ciddor1996":
        n_minus_1 = 0.05792105 / (238.0185 - s2) + 0.00167917 / (57.362 - s2)
    elif formula == "Morton2000":
        n_minus_1 = 8.34254e-5 + 2.406147e-2 / (130.0 - s2) + 1.5998e-4 / (38.9 - s2)
    else:
        raise ValueError(f"`formula` must be one of {FORMULAS}, got {formula!r}")
    return 1.0 + n_minus_1


def vacuum_to_air(wave_vac_angstrom, *, formula="Ciddor1996"):
    """Air wavelengths (Å) of vacuum wavelengths (Å): ``lambda_vac / n(lambda_vac)``."""
    wave = np.asarray(wave_vac_angstrom, dtype=np.float64)
    return wave / refractive_index(wave, formula=formula)


def air_to_vacuum(wave_air_angstrom, *, formula="Ciddor1996", iterations=4):
    """Vacuum wavelengths (Å) of air wavelengths (Å), inverting :func:`vacuum_to_air`.

    Iterates ``lambda_vac = lambda_air * n(lambda_vac)`` from ``lambda_vac = lambda_air``;
    each step shrinks the error by a factor ~1e-4, so ``iterations=4`` leaves < 1e-9 Å.
    """
    air = np.asarray(wave_air_angstrom, dtype=np.float64)
    vac = air.copy()
    for _ in range(int(iterations)):
        vac = air * refractive_index(vac, formula=formula)
    return vac


def convert_wavelengths(wave_angstrom, *, from_vacuum, to_vacuum, formula="Ciddor1996"):
    """Convert between air and vacuum as needed (a copy when nothing changes)."""
    wave = np.asarray(wave_angstrom, dtype=np.float64)
    if bool(from_vacuum) == bool(to_vacuum):
        return wave.copy()
    if to_vacuum:
        return air_to_vacuum(wave, formula=formula)
    return vacuum_to_air(wave, formula=formula)
