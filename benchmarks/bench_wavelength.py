"""Time the full 1-D + 2-D wavelength solution of one 4096-pixel arc.

Usage::

    python benchmarks/bench_wavelength.py [--repeat 3] [--tilt 8.93] [--lamps HgAr,Ne]

The arc is simulated by the demo simulator at full size (4096 x 2048 unbinned pixels,
``demo_data.simulate.make_instrument('full')``), turned into a calibrated frame
(electrons, Poisson + read-noise variance) in memory, and solved with the pipeline's
pure functions: line finding on the central band, identification seeded by the grating
model, the 1-D fit, tracing along the slit, the 2-D fit and the dense lambda(y, x) map.
File I/O and the QA figures are timed separately. Prints wall times (best of
``--repeat``), the ratio to the 2 s target, the number of lines and the RMS, and the
error of the map against the simulator's truth.
"""

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

TARGET_S = 2.0


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--tilt", type=float, default=8.93)
    parser.add_argument("--lamps", default="HgAr,Ne")
    args = parser.parse_args(argv)

    import yaml
    import demo_data.simulate as sim
    from pipeline.wavelength import grating as gr
    from pipeline.wavelength.solve import solve_wavelength
    from pipeline.wavelength.steps import solve_wavelength_file
    from pipeline.workflow.layers import load_night_config
    from pipeline.wavelength.arclines import extract_band, find_arc_lines
    from pipeline.wavelength.linelists import read_line_list, species_for_lamps

    repo = Path(__file__).resolve().parents[1]
    config = load_night_config(repo / "config" / "config.yaml", root=repo)
    instrument = config["instrument"]
    lines_cfg = config.get("arc_lines", {})
    sol_cfg = dict(config.get("wavelength_solution", {}))

    t0 = time.perf_counter()
    inst = sim.make_instrument("full")
    arc = sim.make_arc(inst, args.tilt, lamps=args.lamps, poisson=False, read_noise=False,
                       cosmic_rays=False)
    rn = inst.detector.read_noise_e
    rng = np.random.default_rng(4096)
    signal = np.maximum(arc.truth.illumination_e, 0.0)
    data = (rng.poisson(signal) + rng.normal(0.0, rn, signal.shape)).astype(np.float32)
    variance = (np.maximum(data, 0) + rn ** 2).astype(np.float32)
    mask = np.zeros(data.shape, dtype=np.uint8)
    ny, nx = data.shape
    print(f"simulated a {nx} x {ny} arc ({args.lamps}, tilt {args.tilt} deg) in "
          f"{time.perf_counter() - t0:.1f} s")

    species = species_for_lamps(args.lamps, instrument["lamps"])
    catalogue = read_line_list(species=species)
    nominal = gr.model_from_config(instrument["grating"], tilt_deg=args.tilt, binning=1, nx_px=nx)
    band_options = {k: lines_cfg[k] for k in (
        "detection_snr", "min_separation_px", "continuum_window_px", "continuum_percentile",
        "fwhm_guess_px", "fit_half_width_fwhm", "blend_separation_fwhm", "broad_fwhm_ratio",
        "deblend_passes", "saturation_e") if k in lines_cfg}
    half = int(lines_cfg.get("center_band_half_width_rows", 5))
    solve_options = {k: v for k, v in sol_cfg.items() if k not in (
        "line_list", "exclude_line_sources", "order_overlap_blue_limit_angstrom",
        "tilt_search_deg", "focal_length_search_fraction")}
    solve_options.update(tilt_range_deg=sol_cfg.get("tilt_search_deg", 0.6),
                         focal_range_fraction=sol_cfg.get("focal_length_search_fraction", 0.035))

    times = {"find lines": [], "1-D + 2-D solution": [], "dense map": [], "total": []}
    for _ in range(max(1, args.repeat)):
        t_start = time.perf_counter()
        band = extract_band(data, variance, mask, half_width_rows=half)
        found = find_arc_lines(band.flux, band.variance, mask=band.mask, **band_options)
        t_found = time.perf_counter()
        solution = solve_wavelength(data, variance, mask, found, catalogue, nominal,
                                       reference_row=0.5 * sum(band.rows), **solve_options)
        t_solved = time.perf_counter()
        wave_map = solution.wavelength_map()
        t_map = time.perf_counter()
        times["find lines"].append(t_found - t_start)
        times["1-D + 2-D solution"].append(t_solved - t_found)
        times["dense map"].append(t_map - t_solved)
        times["total"].append(t_map - t_start)

    s1 = solution.solution_1d
    true = arc.truth.wavelength_map()
    err = (wave_map - true) / np.abs(np.gradient(true, axis=1))
    print(f"lines: {len(found)} detected, {s1.n_used} used, {s1.n_rejected} rejected; "
          f"{solution.info['n_points']} traced points on {solution.info['n_lines']} lines")
    print(f"1-D rms: {s1.rms_angstrom:.4f} A = {s1.rms_px:.4f} px = {s1.rms_km_s:.3f} km/s; "
          f"2-D rms {solution.rms_px:.4f} px")
    print(f"map error against the simulator's truth: rms {np.sqrt(np.mean(err ** 2)):.4f} px, "
          f"max {np.abs(err).max():.4f} px")
    print(f"fitted tilt {s1.model.tilt_deg:.4f} deg (true {arc.truth.optics.tilt_deg:.4f}), "
          f"focal length {s1.model.focal_length_mm:.3f} mm "
          f"(true {arc.truth.optics.camera_focal_length_mm:.3f})")
    print(f"wall time, best of {len(times['total'])}:")
    for name, values in times.items():
        print(f"  {name:22s} {min(values):7.3f} s")
    best = min(times["total"])
    print(f"target {TARGET_S:.1f} s: ratio {best / TARGET_S:.2f} "
          f"({'meets' if best < TARGET_S else 'MISSES'} the target)")

    # with the FITS adapters, files and the four QA figures (what a Snakemake job does)
    import tempfile

    from astropy.io import fits

    from pipeline.wavelength.steps import find_arc_lines_file
    from pipeline.core.frames import Frame, write_frame

    with tempfile.TemporaryDirectory() as tmp:
        header = fits.Header({"GRTILT": args.tilt, "LAMPS": args.lamps, "FILTER": "NONE",
                              "BINSPEC": 1, "BINSPAT": 1})
        path = write_frame(Frame(data, variance, mask, header), Path(tmp) / "arc.fits")
        t1 = time.perf_counter()
        find_arc_lines_file(arc=str(path), lines=f"{tmp}/lines.ecsv", **lines_cfg)
        t2 = time.perf_counter()
        solve_wavelength_file(
            arc=str(path), lines=f"{tmp}/lines.ecsv", solution=f"{tmp}/solution.fits",
            qa=f"{tmp}/qa.ecsv", plot_lines=f"{tmp}/a.png", plot_residuals=f"{tmp}/b.png",
            plot_residual_map=f"{tmp}/c.png", plot_dispersion=f"{tmp}/d.png",
            grating=instrument["grating"], lamps=instrument["lamps"], **sol_cfg)
        t3 = time.perf_counter()
    print(f"with FITS I/O: find_arc_lines_file {t2 - t1:.2f} s, solve_wavelength_file "
          f"{t3 - t2:.2f} s (including the 4 PNG figures)")


if __name__ == "__main__":
    main()
