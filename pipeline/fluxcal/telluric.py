"""Telluric bands: their transmission measured on standard stars, divided out of spectra.

Inside the configured bands the standards' measured sensitivity is the true
sensitivity times the atmosphere's molecular transmission at the standard's airmass;
the fit (which leaves the bands out) gives the continuum under them. The template is
that ratio scaled to airmass 1, applied at each spectrum's airmass.
"""

import math
from dataclasses import dataclass, field

import numpy as np

from pipeline.fluxcal.pixels import MAG_PER_REL, as_regions, exclusion_mask

__all__ = ["TelluricTemplate", "telluric_template"]


@dataclass(frozen=True)
class TelluricTemplate:
    """Transmission of the telluric bands at airmass 1, measured on standard stars.

    Parameters
    ----------
    wave_angstrom : ndarray, shape (n,), Angstrom
        Wavelengths inside the bands (increasing).
    ln_transmission : ndarray, shape (n,)
        ``ln t`` at airmass 1 (0 = no absorption).
    sigma_ln : ndarray, shape (n,)
        1-sigma error of ``ln_transmission`` (noise of the standards).
    bands : list of (min, max), Angstrom
        Outside them the transmission is 1.
    airmass_exponent : float
        ``ln t(X) = ln t(1) * X**airmass_exponent``; saturated molecular bands
        grow more slowly than linearly with airmass (about 0.55-0.6 for O2 and
        H2O; common practice, from memory).
    info : dict
    """

    wave_angstrom: np.ndarray
    ln_transmission: np.ndarray
    sigma_ln: np.ndarray
    bands: list
    airmass_exponent: float = 0.6
    info: dict = field(default_factory=dict)

    def transmission(self, wave_angstrom, airmass):
        """Transmission and its ln-error at ``airmass`` (1 and 0 outside the bands).

        Returns
        -------
        transmission, sigma_ln : ndarray, same shape as ``wave_angstrom``
        """
        wave = np.asarray(wave_angstrom, dtype=float)
        scale = float(airmass) ** self.airmass_exponent
        inside = exclusion_mask(wave, self.bands) & (wave >= self.wave_angstrom[0]) & (
            wave <= self.wave_angstrom[-1])
        ln_t = np.where(inside, np.interp(wave, self.wave_angstrom, self.ln_transmission), 0.0)
        sig = np.where(inside, np.interp(wave, self.wave_angstrom, self.sigma_ln), 0.0)
        return np.exp(ln_t * scale), sig * scale


def telluric_template(points, fit, bands, *, airmass_exponent=0.6):
    """Telluric transmission from the standards' pixels in the bands.

    Parameters
    ----------
    points : sequence of SensitivityPoints
        The standards' measured sensitivity; inside the bands it is the true
        sensitivity times the telluric transmission at the standard's airmass.
    fit : SensitivityFit
        Fitted with the bands excluded: the continuum under the bands.
    bands : sequence of [min, max], Angstrom
    airmass_exponent : float

    Returns
    -------
    TelluricTemplate or None
        None when no standard pixel falls in a band.

    Notes
    -----
    ``ln t_1 = 0.4 ln(10) (m_obs - m_fit) / X**b`` per pixel; several
    standards are averaged with inverse-variance weights on the grid of the
    first one that covers a pixel. Masked pixels inside a band are
    interpolated from their neighbours.
    """
    bands = as_regions(bands, "bands")
    if not bands:
        return None
    grids, lns, sigs = [], [], []
    for p in points:
        in_band = exclusion_mask(p.wave_angstrom, bands) & fit.inside(p.wave_angstrom)
        if not in_band.any():
            continue
        scale = float(p.info.get("airmass", 1.0)) ** airmass_exponent
        ln_t = 0.4 * math.log(10.0) * (p.sens_mag - fit.mag(p.wave_angstrom)) / scale
        sig = p.sens_mag_err / MAG_PER_REL / scale
        ok = in_band & p.usable & np.isfinite(ln_t)
        if ok.sum() < 2:
            continue
        grids.append(p.wave_angstrom[in_band])
        lns.append(np.interp(p.wave_angstrom[in_band], p.wave_angstrom[ok], ln_t[ok]))
        sigs.append(np.interp(p.wave_angstrom[in_band], p.wave_angstrom[ok], sig[ok]))
    if not grids:
        return None
    grid = np.unique(np.concatenate(grids))
    num = np.zeros(grid.size)
    den = np.zeros(grid.size)
    for g, ln_t, sig in zip(grids, lns, sigs):
        covered = (grid >= g[0]) & (grid <= g[-1])
        w = 1.0 / np.interp(grid[covered], g, sig) ** 2
        num[covered] += w * np.interp(grid[covered], g, ln_t)
        den[covered] += w
    good = den > 0
    return TelluricTemplate(grid[good], num[good] / den[good], 1.0 / np.sqrt(den[good]),
                            [list(b) for b in bands], float(airmass_exponent),
                            {"n_standards": len(grids)})
