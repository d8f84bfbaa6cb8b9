"""Tables an observer of the invented night would supply, made from the simulator's models.

* ``standards/TRS-17.ecsv``: the tabulated flux of the invented standard star
  (bin-averaged f_lambda in 5-A bins, as published standard-star tables are),
* ``tarn_ridge_extinction.ecsv``: the site's mean extinction curve (mag per
  airmass, smooth, without telluric bands, like a published mean curve).

Both are shipped (committed) files; ``python -m demo_data.observer_tables``
rewrites them, and tests check that they still match the models.
"""

from pathlib import Path

import numpy as np

from . import sources as src

__all__ = ["SHIPPED", "standard_table", "extinction_table", "write_tables"]

HERE = Path(__file__).resolve().parent
SHIPPED = {"standard_TRS-17": "demo_data/standards/TRS-17.ecsv",
           "extinction": "demo_data/tarn_ridge_extinction.ecsv"}


def standard_table(*, bin_width_angstrom=5.0, start=3200.0, stop=10000.0):
    """Bin-averaged flux of TRS-17: columns wavelength_angstrom (bin centre), flux, bin width."""
    from astropy.table import Table
    edges = np.arange(start, stop + bin_width_angstrom / 2, bin_width_angstrom)
    fine = np.linspace(start, stop, int((stop - start) / 0.05) + 1)
    f = src.standard_star_flux(fine)
    cum = np.concatenate([[0.0], np.cumsum(0.5 * (f[1:] + f[:-1]) * np.diff(fine))])
    mean = np.diff(np.interp(edges, fine, cum)) / bin_width_angstrom
    t = Table()
    t["wavelength_angstrom"] = 0.5 * (edges[1:] + edges[:-1])
    t["flux_erg_s_cm2_angstrom"] = mean
    t["bin_width_angstrom"] = np.full(len(mean), bin_width_angstrom)
    t.meta["comments"] = [
        "TRS-17: invented spectrophotometric standard of the invented Tarn Ridge demo night.",
        "f_lambda averaged over each bin (erg/s/cm2/A), air wavelengths, above the atmosphere.",
        "Made by demo_data.observer_tables from demo_data.sources.standard_star_flux.",
    ]
    t.meta["object"] = "TRS-17"
    t["wavelength_angstrom"].unit = "Angstrom"
    t["flux_erg_s_cm2_angstrom"].unit = "erg / (s cm2 Angstrom)"
    t["bin_width_angstrom"].unit = "Angstrom"
    return t


def extinction_table(*, start=3200.0, stop=10000.0, step=50.0):
    """The site's mean extinction curve (mag/airmass), rounded to 0.001 mag as a table would be."""
    from astropy.table import Table
    lam = np.arange(start, stop + step / 2, step)
    t = Table()
    t["wavelength_angstrom"] = lam
    t["extinction_mag_per_airmass"] = np.round(src.extinction_mag_per_airmass(lam), 3)
    t["wavelength_angstrom"].unit = "Angstrom"
    t["extinction_mag_per_airmass"].unit = "mag"
    t.meta["comments"] = [
        "Mean atmospheric extinction at Tarn Ridge Observatory (invented site, 2650 m).",
        "Smooth continuum extinction (Rayleigh + aerosol + ozone); telluric O2/H2O bands not included.",
        "Made by demo_data.observer_tables from demo_data.sources.extinction_mag_per_airmass.",
    ]
    return t


def write_tables():
    (HERE / "standards").mkdir(exist_ok=True)
    standard_table().write(HERE / "standards" / "TRS-17.ecsv", format="ascii.ecsv", overwrite=True)
    extinction_table().write(HERE / "tarn_ridge_extinction.ecsv", format="ascii.ecsv", overwrite=True)


if __name__ == "__main__":
    write_tables()
