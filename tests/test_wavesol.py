"""The wavelength solution against simulator truth and analytic truth.

Truth used here:
* the demo simulator (demo_data: its own optics code, never imports pipeline): the exact
  wavelength of every pixel (``truth.wavelength_map()``) and the exact position of any
  wavelength on any row (``truth.line_x_px``), for arcs at chosen tilts, tilt errors,
  focal-length errors and lamp mixes;
* analytic truth: line positions generated with a known GratingModel, traces generated
  with a known line-tilt polynomial;
* astropy.wcs evaluating the FITS grating algorithm (Greisen et al. 2006).

The "calibrated" arcs below are what pipeline.ccd would produce from the simulator's
frames: the simulated flat-fielded signal (``illumination_e``) with Poisson and read
noise in electrons, and variance = signal + read noise^2.
"""

import warnings

import numpy as np
import pytest
from astropy.io import fits
from astropy.wcs import WCS
from numpy.polynomial import chebyshev as cheb

from pipeline.wavelength import grating as gr
from pipeline.wavelength.arclines import extract_band, find_arc_lines
from pipeline.core.constants import SPEED_OF_LIGHT_KM_S
from pipeline.wavelength.fit1d import WavelengthSolution1D, fit_grating_parameters
from pipeline.wavelength.identify import (isolated_lines, match_lines, merge_unresolved,
                                          search_grating_parameters)
from pipeline.wavelength.products import load_wavelength_map
from pipeline.wavelength.solve import solve_wavelength
from pipeline.wavelength.steps import find_arc_lines_file, solve_wavelength_file
from pipeline.wavelength.tilt import LineTraces, WavelengthSolution2D, fit_line_tilt
from pipeline.core.errors import InputFileError, OrderOverlapWarning, WavelengthSolutionError
from pipeline.core.frames import Frame, write_frame
from pipeline.wavelength.linelists import LineList, read_line_list, species_for_lamps

import demo_data.simulate as sim

# config/instruments/rls.yaml instrument.grating and instrument.lamps (the observer's nominal values)
GRATING = {"groove_density_per_mm": 600, "order": 1, "camera_collimator_angle_deg": 30.0,
           "camera_focal_length_mm": 250.0, "pixel_size_um": 15.0, "collimated_beam_mm": 60.0,
           "blaze_wavelength_angstrom": 5500.0, "detector_center_px": None,
           "order_blocking_filters": {"NONE": None, "GG395": 3950.0, "GG495": 4950.0}}
LAMPS = {"HgAr": ["Hg I", "Ar I"], "Ne": ["Ne I"], "He": ["He I"], "Ar": ["Ar I"]}


def calibrated_arc(inst, tilt, lamps="HgAr,Ne", *, seed=1, cosmic_rays=False, flexure_x_px=0.0,
                   lamp_scale=1.0, header_lamps=None, header_tilt=None, filter_name="NONE"):
    arc = sim.make_arc(inst, tilt, lamps=lamps, poisson=False, read_noise=False,
                       cosmic_rays=cosmic_rays, flexure_x_px=flexure_x_px, seed=seed,
                       lamp_scale=lamp_scale, filter_name=filter_name)
    truth = arc.truth
    signal = np.maximum(truth.illumination_e, 0.0)
    rn = inst.detector.read_noise_e
    rng = np.random.default_rng(seed)
    data = rng.poisson(signal).astype(float) + rng.normal(0.0, rn, signal.shape)
    if cosmic_rays:
        data += truth.cosmic_e
    var = np.maximum(data, 0.0) + rn ** 2
    mask = np.zeros(signal.shape, dtype=np.uint8)
    header = fits.Header()
    header["GRTILT"] = tilt if header_tilt is None else header_tilt
    header["LAMPS"] = lamps if header_lamps is None else header_lamps
    header["FILTER"] = filter_name
    header["BINSPEC"] = inst.detector.bin_x
    header["BINSPAT"] = inst.detector.bin_y
    return data, var, mask, header, truth


def solve(data, var, mask, header, **options):
    band = extract_band(data, var, mask, half_width_rows=5)
    lines = find_arc_lines(band.flux, band.variance, mask=band.mask)
    species = species_for_lamps(header["LAMPS"], LAMPS)
    nominal = gr.model_from_config(GRATING, tilt_deg=header["GRTILT"], binning=header["BINSPEC"],
                                   nx_px=data.shape[1])
    return solve_wavelength(data, var, mask, lines, read_line_list(species=species), nominal,
                               reference_row=0.5 * sum(band.rows), **options)


def map_error_px(solution, truth):
    wmap = solution.wavelength_map()
    true = truth.wavelength_map()
    return (wmap - true) / np.abs(np.gradient(true, axis=1))


def wrong_identifications(solution, truth):
    """Used lines whose listed wavelength does not truly land where the line was measured."""
    s1 = solution.solution_1d
    used = s1.lines["used"]
    x_true = truth.line_x_px(s1.lines["wave_angstrom"][used], s1.reference_row)
    return int(np.sum(np.abs(x_true - s1.lines["x_px"][used]) > 0.25))


# ------------------------------------------------------------------------- simulator truth

@pytest.mark.parametrize("tilt,lamps,cosmic,flexure", [
    (8.93, "HgAr,Ne", False, 0.0),     # demo setup A
    (11.83, "HgAr,Ne", True, 0.15),    # demo setup B, with cosmic rays and a flexure shift
    (8.93, "He,Ne", False, 0.0),
])
def test_whole_detector_error_against_simulated_truth(tilt, lamps, cosmic, flexure):
    inst = sim.make_instrument()          # true tilt +0.18 deg, f +0.72 %, distortion, line tilt
    data, var, mask, header, truth = calibrated_arc(inst, tilt, lamps, cosmic_rays=cosmic,
                                                    flexure_x_px=flexure)
    sol = solve(data, var, mask, header)
    err = map_error_px(sol, truth)
    rms = float(np.sqrt(np.mean(err ** 2)))
    print(f"tilt {tilt} {lamps}: {sol.solution_1d.n_used} lines, 1-D rms "
          f"{sol.solution_1d.rms_px:.4f} px, whole-detector error rms {rms:.4f} px, "
          f"max {np.abs(err).max():.4f} px")
    assert rms <= 0.05                    # the target
    assert np.abs(err).max() < 0.1
    assert wrong_identifications(sol, truth) == 0
    # fitted physical parameters against the simulator's true optics
    m = sol.solution_1d.model
    assert m.tilt_deg == pytest.approx(truth.optics.tilt_deg, abs=0.03)
    assert m.focal_length_mm == pytest.approx(truth.optics.camera_focal_length_mm, rel=2e-3)


def _grid():
    cases = []
    tilt_errors = (-0.5, 0.5, -0.3, 0.3, -0.1, 0.2)
    focal_errors = (-0.03, 0.03, 0.03, -0.03, -0.015, 0.01)
    for i in range(24):
        tilt = 8.2 + 0.25 * i                       # 8.2 .. 13.95 deg: ~4400-7900 A at the centre
        cases.append((round(tilt, 2), tilt_errors[i % 6], focal_errors[(i // 3) % 6],
                      ("HgAr,Ne", "He,Ne")[i % 2]))
    return cases


@pytest.mark.parametrize("tilt,tilt_error,focal_error,lamps", _grid())
def test_identification_grid_has_no_wrong_identification(tilt, tilt_error, focal_error, lamps):
    inst = sim.make_instrument(tilt_error_deg=tilt_error, focal_length_error=focal_error)
    data, var, mask, header, truth = calibrated_arc(inst, tilt, lamps, seed=int(tilt * 100))
    sol = solve(data, var, mask, header)
    assert sol.solution_1d.n_used >= 8
    assert wrong_identifications(sol, truth) == 0
    assert float(np.sqrt(np.mean(map_error_px(sol, truth) ** 2))) < 0.05


def test_lines_on_half_the_detector_still_give_the_whole_detector():
    # HgAr alone at 12.42 deg: the used lines lie between pixels ~400 and ~940, so the blue
    # half is the grating model extrapolated (this case once reached 0.25 px rms when the
    # camera-axis prior drifted with the iterations)
    inst = sim.make_instrument(tilt_error_deg=-0.05, focal_length_error=0.023)
    data, var, mask, header, truth = calibrated_arc(inst, 12.42, "HgAr", seed=7, lamp_scale=0.1,
                                                    cosmic_rays=True)
    sol = solve(data, var, mask, header)
    assert sol.solution_1d.info["line_coverage_fraction"] < 0.6
    assert wrong_identifications(sol, truth) == 0
    assert float(np.sqrt(np.mean(map_error_px(sol, truth) ** 2))) < 0.05


def test_wrong_lamps_fail_instead_of_a_wrong_solution():
    inst = sim.make_instrument()
    data, var, mask, header, _ = calibrated_arc(inst, 8.93, "HgAr,Ne", header_lamps="He")
    with pytest.raises(WavelengthSolutionError, match="identified|listed lines|lines"):
        solve(data, var, mask, header)


def test_tilt_far_outside_the_search_range_fails():
    inst = sim.make_instrument()
    data, var, mask, header, _ = calibrated_arc(inst, 8.93, header_tilt=10.93)   # 2 deg off
    with pytest.raises(WavelengthSolutionError):
        solve(data, var, mask, header)


def test_too_faint_arc_fails_with_a_clear_message():
    inst = sim.make_instrument()
    data, var, mask, header, _ = calibrated_arc(inst, 8.93, lamp_scale=2e-4)
    with pytest.raises(WavelengthSolutionError, match=r"clean arc lines detected .*need >= 8"):
        solve(data, var, mask, header)


# --------------------------------------------------------------------------- analytic truth

def _model(**kw):
    base = dict(groove_density_per_mm=600, order=1, camera_collimator_angle_deg=30.0,
                tilt_deg=10.0, focal_length_mm=250.0, pixel_size_um=15.0, binning=2,
                center_px=511.5)
    base.update(kw)
    return gr.GratingModel(**base)


def test_search_recovers_tilt_and_focal_length(rng):
    truth = _model(tilt_deg=10.37, focal_length_mm=250.0 * 1.021, center_px=512.0)
    nominal = _model()
    listed = np.sort(rng.uniform(4600, 7400, 60))
    x = truth.pixel(listed)
    seen = (x > 0) & (x < 1023) & (rng.uniform(size=60) > 0.15)     # some lines missing
    detected = np.concatenate([x[seen], rng.uniform(0, 1023, 6)])    # and a few extra
    best = search_grating_parameters(detected, listed, nominal, 1024)[0]
    assert best["tilt_deg"] == pytest.approx(10.37, abs=0.01)
    assert best["focal_length_mm"] == pytest.approx(255.25, rel=0.003)
    assert best["score"] >= seen.sum()


def test_fit_recovers_exact_parameters_from_noise_free_lines():
    truth = _model(tilt_deg=10.2, focal_length_mm=253.0, center_px=514.0)
    wave = np.linspace(4900, 7100, 25)
    x = truth.pixel(wave)
    fitted, coeffs, errors, _ = fit_grating_parameters(
        x, np.full(x.size, 0.01), wave, _model(tilt_deg=10.15, focal_length_mm=251.0),
        center_prior_px=1e4)
    assert fitted.tilt_deg == pytest.approx(10.2, abs=1e-6)
    assert fitted.focal_length_mm == pytest.approx(253.0, abs=1e-4)
    assert fitted.center_px == pytest.approx(514.0, abs=1e-3)
    assert np.all(coeffs == 0) and errors["tilt_deg"] > 0
    # with a cubic distortion, the correction term T3 takes it and the model stays right
    domain = (0.0, 1023.0)
    distortion = np.zeros(4)
    distortion[3] = 0.4
    lam = wave + cheb.chebval((2 * x - 1023) / 1023, distortion)
    fitted, coeffs, _, _ = fit_grating_parameters(
        x, np.full(x.size, 0.01), lam, _model(tilt_deg=10.15), correction_terms=(3,),
        domain_px=domain, center_prior_px=1e4)
    assert coeffs[3] == pytest.approx(0.4, abs=1e-5)
    assert fitted.tilt_deg == pytest.approx(10.2, abs=1e-5)


def test_camera_axis_prior_stays_on_the_nominal_position():
    # the prior is centred on the nominal camera axis, not on the starting model's: with an
    # extremely tight prior the fit keeps x_c at the nominal value whatever the start
    truth = _model(tilt_deg=10.2, focal_length_mm=253.0, center_px=511.5)
    wave = np.linspace(4900, 7100, 25)
    x = truth.pixel(wave)
    start = _model(tilt_deg=10.15, focal_length_mm=251.0, center_px=530.0)
    fitted, _, _, _ = fit_grating_parameters(x, np.full(x.size, 0.01), wave, start,
                                                center_prior_px=1e-4, center_nominal_px=511.5)
    assert fitted.center_px == pytest.approx(511.5, abs=1e-3)
    assert fitted.tilt_deg == pytest.approx(10.2, abs=1e-5)


def test_match_lines_is_one_to_one():
    det = np.array([10.0, 20.0, 20.6, 50.0])
    pred = np.array([10.4, 20.5, 80.0])
    d, p = match_lines(det, pred, tolerance_px=1.0)
    assert list(zip(d, p)) == [(0, 0), (2, 1)]        # 20.0 loses to its closer rival 20.6


def test_isolation_and_merging_of_listed_lines():
    w = np.array([5000.0, 5003.0, 5100.0, 5101.0, 5200.0, 5200.05])
    sp = np.array(["Ne I", "Ar I", "Ne I", "Ne I", "Ne I", "Ne I"])
    inten = np.array([100.0, 1.0, 100.0, 2.0, 1000.0, 300.0])
    iso = isolated_lines(w, sp, inten, min_separation_angstrom=5.0, faint_ratio=0.03)
    # other species always count; a same-species neighbour at 2 % does not
    assert iso.tolist() == [False, False, True, False, False, False]
    lines = LineList(sp, w, inten, np.array(["s"] * 6), np.array([""] * 6))
    merged = merge_unresolved(lines, max_separation_angstrom=0.2)
    assert len(merged) == 5
    assert merged.wave_air_angstrom[-1] == pytest.approx((5200 * 1000 + 5200.05 * 300) / 1300)


def _synthetic_solution(q, shape=(200, 800)):
    ny, nx = shape
    model = _model(binning=2, center_px=(nx - 1) / 2)
    s1 = WavelengthSolution1D(model, model, np.zeros(4), (0.0, nx - 1.0), nx, 100.0, {},
                                 0, 0, 0, 0, 0, {})
    return WavelengthSolution2D(s1, np.asarray(q, float), (nx - 1) / 2, nx / 2, 100.0, ny / 2,
                                   shape, None, None, None, 0, 0, {})


def test_line_tilt_fit_recovers_a_known_polynomial(rng):
    q_true = np.array([[-0.8, -0.3], [0.05, -0.1], [0.01, 0.02]])
    helper = _synthetic_solution(q_true)
    x_ref = np.linspace(30, 770, 15)
    y = np.arange(4.0, 200.0, 8.0)
    offsets = rng.normal(0, 0.02, x_ref.size)
    # measured x solves x + Q(x, y) = x_ref - offset (fixed point)
    x = np.broadcast_to(x_ref - offsets, (y.size, x_ref.size)).copy()
    for _ in range(30):
        x = (x_ref - offsets)[None, :] - helper.shift(x, y[:, None])
    traces = LineTraces(np.linspace(5000, 6500, 15), x_ref, y, x, np.full(x.shape, 0.01),
                           np.ones(x.shape, bool))
    fit = fit_line_tilt(traces, helper.solution_1d, (200, 800))
    np.testing.assert_allclose(fit.q_coeffs, q_true, atol=1e-8)
    np.testing.assert_allclose(fit.info["line_offsets_px"], offsets, atol=1e-8)
    assert fit.rms_px < 1e-8
    with pytest.raises(WavelengthSolutionError, match="too few"):
        fit_line_tilt(LineTraces(traces.wave_angstrom, x_ref, y, x, traces.x_err_px,
                                       np.zeros(x.shape, bool)), helper.solution_1d, (200, 800))


def test_dense_map_equals_direct_evaluation():
    sol = _synthetic_solution([[-0.8, -0.3], [0.05, -0.1], [0.01, 0.02]])
    wmap = sol.wavelength_map()
    yy, xx = np.mgrid[0:200, 0:800]
    np.testing.assert_allclose(wmap, sol.wavelength(xx, yy), atol=1e-6)


# ------------------------------------------------------------------------------- products

@pytest.fixture(scope="module")
def solved_arc(tmp_path_factory):
    """The demo setup B arc through both file adapters (no order-blocking filter in the header)."""
    tmp = tmp_path_factory.mktemp("wavesol")
    inst = sim.make_instrument()
    data, var, mask, header, truth = calibrated_arc(inst, 11.83, filter_name="NONE")
    arc = write_frame(Frame(data.astype(np.float32), var.astype(np.float32), mask, header),
                      tmp / "calibrated" / "arc_b.fits")
    lines = tmp / "wavelength" / "arc_b_lines.ecsv"
    find_arc_lines_file(arc=str(arc), lines=str(lines))
    out = {k: str(tmp / name) for k, name in (
        ("solution", "wavelength/arc_b_solution.fits"), ("qa", "wavelength/arc_b_qa.ecsv"),
        ("plot_lines", "qa/arc_b_wavelength_lines.png"),
        ("plot_residuals", "qa/arc_b_wavelength_residuals.png"),
        ("plot_residual_map", "qa/arc_b_wavelength_residual_map.png"),
        ("plot_dispersion", "qa/arc_b_wavelength_dispersion.png"))}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        sol = solve_wavelength_file(arc=str(arc), lines=str(lines), grating=GRATING,
                                       lamps=LAMPS, setup="G600_t11.83_test", **out)
    return {"tmp": tmp, "arc": arc, "lines": lines, "out": out, "sol": sol, "truth": truth,
            "warnings": caught}


def test_solution_file_map_matches_truth(solved_arc):
    m = load_wavelength_map(solved_arc["out"]["solution"])
    true = solved_arc["truth"].wavelength_map()
    assert m.wave_angstrom.dtype == np.float64 and m.shape == true.shape
    err = (m.wave_angstrom - true) / np.abs(np.gradient(true, axis=1))
    assert np.sqrt(np.mean(err ** 2)) < 0.05
    h = m.header
    assert h["SETUP"] == "G600_t11.83_test" and h["BUNIT"] == "Angstrom"
    assert h["WSTILT0"] == 11.83 and h["WSTILT"] == pytest.approx(12.01, abs=0.03)  # truth +0.18
    assert h["WSRMSV"] == pytest.approx(
        SPEED_OF_LIGHT_KM_S * h["WSRMSA"] / h["CRVAL1"], rel=0.1)
    for key in ("PIPEVERS", "INPUT01", "INPUT02", "WCC3", "WQ11", "WS2DRMSP"):
        assert key in h
    with fits.open(solved_arc["out"]["solution"]) as hdul:
        assert [h.name for h in hdul] == ["PRIMARY", "LINES", "TRACE"]
        assert hdul["LINES"].data["used"].sum() == h["WSNLINE"]


def test_wcs_and_correction_reproduce_the_reference_row(solved_arc):
    m = load_wavelength_map(solved_arc["out"]["solution"])
    h = m.header
    row = int(h["WSYREF"])
    x = np.arange(m.shape[1], dtype=float)
    world = WCS(h).all_pix2world(x, np.full(x.size, float(row)), 0)[0] * 1e10   # m -> A
    # the grating model the solver fitted, evaluated by this module
    model = solved_arc["sol"].solution_1d.model
    np.testing.assert_allclose(world, model.wavelength(x), atol=1e-8)  # AWAV-GRA: grating in air
    u = (2 * x - h["WCDOM0"] - h["WCDOM1"]) / (h["WCDOM1"] - h["WCDOM0"])
    coeffs = [h[f"WCC{k}"] for k in range(h["WCDEG"] + 1)]
    full = world + cheb.chebval(u, coeffs)
    # Q = 0 on the reference row, so WCS + correction is the map there
    assert np.abs(full - m.wave_angstrom[row]).max() < 0.01
    # axis 2: our own linear axis type, the 0-based detector row (astropy.wcs evaluates it)
    assert (h["CTYPE2"], h["CUNIT2"]) == ("SLITROW", "pixel")
    rows = WCS(h).all_pix2world(np.zeros(3), np.array([0.0, 5.0, 40.0]), 0)[1]
    np.testing.assert_allclose(rows, [0.0, 5.0, 40.0])


def test_qa_table_and_figures(solved_arc):
    from astropy.table import Table

    t = Table.read(solved_arc["out"]["qa"], format="ascii.ecsv")
    for key in ("rms_angstrom", "rms_px", "rms_km_s", "n_used", "n_rejected", "tilt_fitted_deg",
                "tilt_nominal_deg", "focal_length_fitted_mm", "detector_offset_px", "rms_2d_px",
                "dispersion_center_angstrom_per_px", "order_overlap_unblocked"):
        assert key in t.meta
    assert t.meta["n_used"] == int(t["used"].sum())
    used = np.asarray(t["used"])
    assert t.meta["rms_px"] == pytest.approx(np.sqrt(np.mean(np.asarray(t["residual_px"])[used] ** 2)))
    for key in ("plot_lines", "plot_residuals", "plot_residual_map", "plot_dispersion"):
        with open(solved_arc["out"][key], "rb") as stream:
            assert stream.read(8) == b"\x89PNG\r\n\x1a\n"
    from pipeline.products.manifest import product_kind
    assert product_kind("wavelength/arc_b_qa.ecsv") == "wavelength_qa"


def test_order_overlap_warned_without_blocking_filter(solved_arc):
    # setup B (~5600-7600 A) with FILTER = NONE: second-order 3200-3800 A light reaches the detector
    assert any(issubclass(w.category, OrderOverlapWarning) for w in solved_arc["warnings"])
    from astropy.table import Table
    assert Table.read(solved_arc["out"]["qa"], format="ascii.ecsv").meta["order_overlap_unblocked"]


def test_failed_identification_writes_nothing(tmp_path):
    inst = sim.make_instrument()
    data, var, mask, header, _ = calibrated_arc(inst, 8.93, header_lamps="He")
    arc = write_frame(Frame(data.astype(np.float32), var.astype(np.float32), mask, header),
                      tmp_path / "arc.fits")
    lines = tmp_path / "arc_lines.ecsv"
    find_arc_lines_file(arc=str(arc), lines=str(lines))
    target = tmp_path / "arc_solution.fits"
    with pytest.raises(WavelengthSolutionError, match=r"arc.fits \(setup S\)"):
        solve_wavelength_file(arc=str(arc), lines=str(lines), solution=str(target),
                                 qa=str(tmp_path / "qa.ecsv"), grating=GRATING, lamps=LAMPS,
                                 setup="S")
    assert not target.exists()
    # a header without the binning names the keyword
    del header["BINSPEC"]
    write_frame(Frame(data.astype(np.float32), var.astype(np.float32), mask, header), arc)
    with pytest.raises(InputFileError, match="BINSPEC"):
        solve_wavelength_file(arc=str(arc), lines=str(lines), solution=str(target),
                                 qa=str(tmp_path / "qa.ecsv"), grating=GRATING, lamps=LAMPS)


def test_load_wavelength_map_rejects_bad_files(tmp_path):
    with pytest.raises(InputFileError, match="missing.fits"):
        load_wavelength_map(tmp_path / "missing.fits")
    fits.PrimaryHDU(np.ones((4, 5))).writeto(tmp_path / "nounit.fits")
    with pytest.raises(InputFileError, match="BUNIT"):
        load_wavelength_map(tmp_path / "nounit.fits")
    hdu = fits.PrimaryHDU(np.tile(np.arange(5.0)[::-1], (4, 1)))
    hdu.header["BUNIT"] = "Angstrom"
    hdu.writeto(tmp_path / "flipped.fits")
    with pytest.raises(InputFileError, match="increase along axis 1"):
        load_wavelength_map(tmp_path / "flipped.fits")
