"""Tables an observer of the invented night would supply, made from the simulator's models.

* ``standards/TRS-17.ecsv``: the tabulated flux of the invented standard star
  (bin-averaged f_lambda in 5-A bins, as published standard-star tables are),
* ``tarn_ridge_extinction.ecsv``: the site's mean extinction curve (mag per
  airmass, smooth, without telluric bands, like a published mean curve),
* for the second instrument (WREN, Fellhaven Observatory): ``standards/FHV-S4.ecsv``
  in other conventions (wavelength in nm, VACUUM, units in the ECSV metadata; AB
  magnitudes of the bin-averaged f_nu) and ``fellhaven_extinction.ecsv``.

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
WREN_SHIPPED = {"standard_FHV-S4": "demo_data/standards/FHV-S4.ecsv",
                "extinction": "demo_data/fellhaven_extinction.ecsv"}
C_ANGSTROM_PER_S = 2.99792458e18


def standard_table(*, bin_width_angstrom=5.0, start=3200.0, stop=10000.0):
    """Bin-averaged flux of TRS-17: columns wavelength_angstrom (bin centre), flux, bin width."""
    from astropy.table import Table
    edges = np.arange(start, stop + bin_width_angstrom / 2, bin_width_angstrom)
    fine = np.linspace(start, stop, int((stop - start) / 0.05) + 1)
    f = src.TARGETS["TRS-17"].f_lambda_at_telescope(fine)   # air wavelengths, star at rest
    cum = np.concatenate([[0.0], np.cumsum(0.5 * (f[1:] + f[:-1]) * np.diff(fine))])
    mean = np.diff(np.interp(edges, fine, cum)) / bin_width_angstrom
    t = Table()
    t["wavelength_angstrom"] = 0.5 * (edges[1:] + edges[:-1])
    t["flux_erg_s_cm2_angstrom"] = mean
    t["bin_width_angstrom"] = np.full(len(mean), bin_width_angstrom)
    t.meta["comments"] = [
        "TRS-17: invented spectrophotometric standard of the invented Tarn Ridge demo night.",
        "f_lambda averaged over each bin (erg/s/cm2/A), AIR wavelengths (standard air, Ciddor 1996),",
        "above the atmosphere; the star is at rest in the barycentric frame.",
        "Made by demo_data.observer_tables from demo_data.sources.standard_star_flux.",
    ]
    t.meta["object"] = "TRS-17"
    t["wavelength_angstrom"].unit = "Angstrom"
    t["flux_erg_s_cm2_angstrom"].unit = "erg / (s cm2 Angstrom)"
    t["bin_width_angstrom"].unit = "Angstrom"
    return t


def extinction_table(*, start=3200.0, stop=10000.0, step=50.0, site=src.SITE,
                     site_text="Tarn Ridge Observatory (invented site, 2650 m)"):
    """The site's mean extinction curve (mag/airmass), rounded to 0.001 mag as a table would be."""
    from astropy.table import Table
    lam = np.arange(start, stop + step / 2, step)
    t = Table()
    t["wavelength_angstrom"] = lam
    t["extinction_mag_per_airmass"] = np.round(src.extinction_mag_per_airmass(lam, site=site), 3)
    t["wavelength_angstrom"].unit = "Angstrom"
    t["extinction_mag_per_airmass"].unit = "mag"
    t.meta["comments"] = [
        f"Mean atmospheric extinction at {site_text}.",
        "Smooth continuum extinction (Rayleigh + aerosol + ozone); telluric O2/H2O bands not included.",
        "Made by demo_data.observer_tables from demo_data.sources.extinction_mag_per_airmass.",
    ]
    return t


def wren_standard_table(*, bin_width_nm=2.0, start_nm=400.0, stop_nm=1000.0):
    """FHV-S4 in the WREN team's conventions: vacuum nm, AB magnitudes of the bin-averaged f_nu.

    Columns ``wavelength`` (nm, VACUUM, bin centre), ``ab_mag`` (``-2.5 log10 <f_nu> - 48.60``,
    f_nu in erg/s/cm2/Hz averaged over the wavelength bin), ``bin_width`` (nm); units in
    the ECSV column metadata, conventions in the table metadata.
    """
    from astropy.table import Table
    edges = np.arange(start_nm, stop_nm + bin_width_nm / 2, bin_width_nm) * 10.0   # Angstrom
    fine = np.linspace(edges[0], edges[-1], int((edges[-1] - edges[0]) / 0.05) + 1)
    f_nu = src.WREN_TARGETS["FHV-S4"].continuum(fine) * fine ** 2 / C_ANGSTROM_PER_S
    cum = np.concatenate([[0.0], np.cumsum(0.5 * (f_nu[1:] + f_nu[:-1]) * np.diff(fine))])
    mean = np.diff(np.interp(edges, fine, cum)) / np.diff(edges)
    t = Table()
    t["wavelength"] = 0.05 * (edges[1:] + edges[:-1])
    t["ab_mag"] = -2.5 * np.log10(mean) - 48.60
    t["bin_width"] = np.full(len(mean), bin_width_nm)
    t["wavelength"].unit = "nm"
    t["ab_mag"].unit = "mag(AB)"
    t["bin_width"].unit = "nm"
    t.meta["object"] = "FHV-S4"
    t.meta["wavelength_medium"] = "vacuum"
    t.meta["flux_quantity"] = ("AB magnitude of f_nu averaged over each wavelength bin: "
                               "-2.5 log10(<f_nu> / (erg s-1 cm-2 Hz-1)) - 48.60")
    t.meta["comments"] = [
        "FHV-S4: invented spectrophotometric standard of the invented Fellhaven Observatory night.",
        "Above the atmosphere; the star is at rest in the barycentric frame.",
        "Made by demo_data.observer_tables from demo_data.sources.WREN_TARGETS['FHV-S4'].",
    ]
    return t


def write_tables():
    (HERE / "standards").mkdir(exist_ok=True)
    standard_table().write(HERE / "standards" / "TRS-17.ecsv", format="ascii.ecsv", overwrite=True)
    extinction_table().write(HERE / "tarn_ridge_extinction.ecsv", format="ascii.ecsv", overwrite=True)
    from .wren import ATMOSPHERE
    wren_standard_table().write(HERE / "standards" / "FHV-S4.ecsv", format="ascii.ecsv",
                                overwrite=True)
    extinction_table(site=ATMOSPHERE, site_text="Fellhaven Observatory (invented site, 1850 m)",
                     start=3600.0).write(HERE / "fellhaven_extinction.ecsv", format="ascii.ecsv",
                                         overwrite=True)


if __name__ == "__main__":
    write_tables()
