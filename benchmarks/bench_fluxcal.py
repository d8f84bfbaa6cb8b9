"""Time the flux-calibration core on full-size spectra (prints figures; no assertions).

    python benchmarks/bench_fluxcal.py [--pixels 4096] [--spectra 50]

Measures: bin-integrating a 5-A standard table onto the pixels, measuring and fitting the
sensitivity (B-spline with rejection), and calibrating N science spectra; plus the start-up
cost of importing the adapters' module (what every Snakemake job pays).
"""

import argparse
import subprocess
import sys
import time

import numpy as np


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--pixels", type=int, default=4096)
    parser.add_argument("--spectra", type=int, default=50)
    args = parser.parse_args(argv)

    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-c", "import pipeline.fluxcal.steps"], check=True)
    t_import = time.perf_counter() - t0

    from pipeline.fluxcal.calibrate import calibrate_spectrum
    from pipeline.fluxcal.pixels import pixel_edges
    from pipeline.fluxcal.sensitivity import fit_sensitivity, measure_sensitivity
    from pipeline.fluxcal.standards import FluxTable, table_flux_in_pixels

    rng = np.random.default_rng(1)
    centres = np.arange(3202.5, 10000.0, 5.0)
    table = FluxTable(centres, 1e-13 * (centres / 5000.0) ** -2,
                         bin_width_angstrom=np.full(centres.size, 5.0))
    wave = np.linspace(4000.0, 8000.0, args.pixels)
    true_mag = 38.5 + 0.5 * np.exp(-((wave - 5800.0) / 1500.0) ** 2)
    edges = pixel_edges(wave)

    t0 = time.perf_counter()
    flux_pix = table_flux_in_pixels(table, edges)
    t_table = time.perf_counter() - t0
    mean = 60.0 * np.diff(edges) * 10 ** (0.4 * true_mag) * flux_pix
    counts = rng.normal(mean, np.sqrt(mean + 16))

    t0 = time.perf_counter()
    pts = measure_sensitivity(wave, counts, mean + 16, exptime_s=60.0, airmass=1.0,
                              flux_table=table)
    fit = fit_sensitivity(pts)
    t_fit = time.perf_counter() - t0

    t0 = time.perf_counter()
    for _ in range(args.spectra):
        calibrate_spectrum(wave, counts, mean + 16, exptime_s=60.0, airmass=1.3,
                           sensitivity=fit)
    t_cal = (time.perf_counter() - t0) / args.spectra

    err = np.max(np.abs(fit.sensitivity(wave) / 10 ** (0.4 * true_mag) - 1))
    print(f"pixels per spectrum          {args.pixels}")
    print(f"import pipeline.fluxcal.steps  {t_import:8.3f} s (new interpreter, per job)")
    print(f"table onto pixels            {1e3 * t_table:8.2f} ms")
    print(f"measure + fit sensitivity    {1e3 * t_fit:8.2f} ms ({fit.info['n_coeffs']} coeffs, "
          f"{fit.info['n_iter']} rounds, max error {100 * err:.3f} %)")
    print(f"calibrate one spectrum       {1e3 * t_cal:8.2f} ms (mean of {args.spectra})")
    print(f"ratio fit / calibrate        {t_fit / t_cal:8.1f}")


if __name__ == "__main__":
    main()
