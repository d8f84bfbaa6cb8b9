"""Boxcar and optimal extraction (pipeline/extraction/extract.py).

Truth used here:
* analytic frames: pixel-integrated Gaussian profiles (scipy.special.ndtr) with
  Poisson and read noise of known variance; the Cramer-Rao bound of a flux
  with a known profile, 1 / sum(P^2 / V) (Horne 1986, PASP 98, 609, eq. 9);
* demo-simulator truth (independent code): the object's electrons per detector
  column along its trace, its noise-free image and the pixel variances.
"""

import warnings

import numpy as np
import pytest
from scipy.special import ndtr

from pipeline.core.errors import ConfigError
from pipeline.extraction.extract import aperture_weights, extract
from pipeline.extraction.frame import reduce_frame
from pipeline.core.maskbits import MaskBit
from pipeline.extraction.rectify import resample_rows
from pipeline.extraction.skylines import load_sky_lines

NY, NX = 60, 600


def _minimum_variance(profile, variance, good=None):
    """Cramer-Rao bound of a flux with a known profile, 1 / sum(P^2 / V) per column (Horne
    1986, eq. 11 with exact weights); written here, not taken from the code under test."""
    good = np.ones(profile.shape, bool) if good is None else good
    s = np.sum(np.where(good & (variance > 0), profile ** 2 / np.where(variance > 0, variance, 1.0),
                        0.0), axis=0)
    return np.where(s > 0, 1.0 / np.where(s > 0, s, 1.0), np.inf)


def _profile(x, *, centre=30.0, curvature=3.0, slope=1.5, sigma0=1.1):
    trace = centre + curvature * ((x - NX / 2) / (NX / 2)) ** 2 + slope * (x - NX / 2) / (NX / 2)
    sigma = sigma0 + 0.2 * x / NX
    rows = np.arange(NY)[:, None]
    prof = ndtr((rows + 0.5 - trace) / sigma) - ndtr((rows - 0.5 - trace) / sigma)
    return trace, prof


def _analytic_runs(rng, flux0, *, n_runs=25, sky=200.0, rn=4.0, half=4.5):
    x = np.arange(NX)
    trace, prof = _profile(x)
    flux = flux0 * (1 + 0.3 * np.sin(x / 50.0))
    obj = flux * prof
    true_var = rn ** 2 + sky + obj
    inap = np.abs(np.arange(NY)[:, None] - trace) <= half
    in_ap = flux * np.where(inap, prof, 0).sum(axis=0)  # the flux inside the window
    p_ap = np.where(inap, prof, 0) / np.where(inap, prof, 0).sum(axis=0)
    out = []
    for _ in range(n_runs):
        d = rng.poisson(obj + sky) - sky + rng.normal(0, rn, obj.shape)
        v = rn ** 2 + np.clip(d + sky, 0, None)  # data-based, as the CCD step writes it
        out.append(extract(d, v, np.zeros(d.shape, np.uint8), trace, half_width_px=half,
                           background_variance=np.full(d.shape, rn ** 2 + sky),
                           signal_variance_factor=1.0))
    return out, in_ap, _minimum_variance(p_ap, true_var)


@pytest.mark.parametrize("flux0", [300.0, 3000.0])
def test_optimal_extraction_is_unbiased_honest_and_efficient(rng, flux0):
    runs, truth, min_var = _analytic_runs(rng, flux0)
    fl = np.array([r.flux for r in runs])
    var = np.array([r.variance for r in runs])
    bias = np.sum(fl.mean(axis=0) - truth) / np.sum(truth)
    err = np.sqrt(np.sum(var.mean(axis=0))) / np.sum(truth) / np.sqrt(len(runs))
    assert abs(bias) < max(3 * err, 0.001)  # per-pixel S/N ~8 (flux0=300) and ~60
    chi2 = np.mean((fl - truth) ** 2 / var)
    assert 0.95 < chi2 < 1.05
    # reported and actual variance at the Cramer-Rao bound of the true profile
    assert np.mean(var.mean(axis=0) / min_var) == pytest.approx(1.0, abs=0.02)
    assert np.mean(fl.var(axis=0, ddof=1) / min_var) == pytest.approx(1.0, abs=0.05)
    box = np.array([r.boxcar_flux for r in runs])
    assert abs(np.sum(box.mean(axis=0) - truth) / np.sum(truth)) < max(3 * err * 1.3, 0.001)


def test_boxcar_to_optimal_variance_ratio_matches_gaussian_theory():
    # background-limited Gaussian, sigma = 2 rows, aperture +-3 sigma: analytic ratio
    # var_box / var_opt = N_pix * sum(P^2) (analytic for a Gaussian profile: 1.65 for a +-3 sigma box when background-limited)
    x = np.arange(200)
    rows = np.arange(41)[:, None]
    trace = np.full(x.size, 20.0)
    prof = ndtr((rows + 0.5 - trace) / 2.0) - ndtr((rows - 0.5 - trace) / 2.0)
    bkg = np.full(prof.shape, 100.0)
    ex = extract(1e-6 * prof, bkg, np.zeros(prof.shape, np.uint8), trace, half_width_px=6.0,
                 background_variance=bkg, signal_variance_factor=0.0)
    p_in = np.where(np.abs(rows - trace) <= 6.0, prof, 0.0)
    p_in = p_in / p_in.sum(axis=0)
    # boxcar of 12 rows: 11 whole rows and two half rows, so its variance is 11.5 * B
    box_w2 = np.sum(aperture_weights(trace, 41, 6.0)[:, 0] ** 2)
    assert box_w2 == pytest.approx(11.5)
    expected = box_w2 * np.sum(p_in[:, 0] ** 2)
    assert np.median(ex.boxcar_variance / ex.variance) == pytest.approx(expected, rel=0.01)
    assert expected == pytest.approx(1.65, abs=0.06)


def test_deviant_pixels_are_rejected_and_flagged(rng):
    x = np.arange(NX)
    trace, prof = _profile(x)
    obj = 5000.0 * prof
    d = rng.poisson(obj + 100.0) - 100.0
    v = 100.0 + obj
    hits = [(int(round(trace[j])), j) for j in (50, 200, 410)]
    for yy, j in hits:
        d[yy + 1, j] += 4000.0  # unflagged cosmic rays inside the aperture
    ex = extract(d, v, np.zeros(d.shape, np.uint8), trace, half_width_px=4.5,
                 background_variance=np.full(d.shape, 100.0), signal_variance_factor=1.0)
    for yy, j in hits:
        assert ex.rejected[yy + 1, j]
        assert abs(ex.flux[j] - 5000.0 * prof[:, j][np.abs(np.arange(NY) - trace[j]) <= 4.5].sum()) \
            < 5 * np.sqrt(ex.variance[j])
    assert ex.info["n_rejected"] <= 3 + 3  # a handful of false rejections at most


def test_masked_pixels_flag_the_spectrum_only_when_they_matter():
    x = np.arange(NX)
    trace, prof = _profile(x)
    d = 1000.0 * prof
    v = np.full(d.shape, 10.0) + d
    mask = np.zeros(d.shape, np.uint8)
    core = np.round(trace).astype(int)
    mask[core[100] - 3:core[100] + 4, 100] = MaskBit.SATURATED  # whole core: flagged
    mask[core[300] + 3, 300] = MaskBit.COSMIC_RAY  # a wing pixel: estimate still good
    mask[core[200], 200] = MaskBit.COSMIC_RAY  # the core pixel (~30 % of the profile): fine
    mask[core[250], 250] = MaskBit.SATURATED  # the same for saturation: flagged (> 5 %)
    ex = extract(d, v, mask, trace, half_width_px=4.5)
    assert ex.mask[100] & MaskBit.SATURATED
    assert ex.mask[300] == 0 and ex.mask[200] == 0
    assert ex.mask[250] & MaskBit.SATURATED
    in_ap = np.abs(np.arange(NY) - trace[200]) <= 4.5
    assert ex.flux[200] == pytest.approx(1000.0 * prof[in_ap, 200].sum(), rel=2e-3)
    assert ex.flux[300] == pytest.approx(1000.0 * prof[np.abs(np.arange(NY) - trace[300]) <= 4.5,
                                                          300].sum(), rel=1e-3)


def test_aperture_weights_cover_exactly_the_width():
    w = aperture_weights(np.array([10.3, 20.0]), 40, 2.7)
    np.testing.assert_allclose(w.sum(axis=0), 5.4)


def test_extract_rejects_bad_input():
    d = np.ones((10, 20))
    with pytest.raises(ValueError, match="`trace_px` must have 20 elements"):
        extract(d, d, np.zeros(d.shape, np.uint8), np.zeros(19), half_width_px=2)
    with pytest.raises(ValueError, match="`half_width_px`"):
        extract(d, d, np.zeros(d.shape, np.uint8), np.zeros(20), half_width_px=0)
    with pytest.raises(ValueError, match="`variance` must have the shape"):
        extract(d, d[:, :5], np.zeros(d.shape, np.uint8), np.zeros(20), half_width_px=2)


def test_reduce_frame_names_unknown_options():
    d = np.ones((10, 20))
    with pytest.raises(ConfigError, match="extraction: unknown key"):
        reduce_frame(d, d, np.zeros(d.shape, np.uint8), np.ones((10, 20)),
                     extraction={"aperture_fwhmm": 2})


# -------------------------------------------------------------- against the demo simulator
@pytest.fixture(scope="module")
def star_reductions():
    from test_sky import simulated_frame

    lines = load_sky_lines()
    out = []
    for seed in (11, 12, 14):
        f = simulated_frame("TRV-9", exptime_s=900.0, seed=seed)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            red = reduce_frame(f["data"], f["variance"], f["mask"], f["wave0"],
                               line_wave_angstrom=lines["wavelength_air_angstrom"],
                               spatial_scale_arcsec_per_px=0.4)
        out.append((f, red))
    return out


def _truth_on_grid(truth, grid):
    """Simulator electrons per column at the trace, integrated onto the output bins."""
    tr = truth.info["trace"]
    lam = np.asarray(tr["wavelength_angstrom"], float)
    edges = np.r_[1.5 * lam[0] - 0.5 * lam[1], 0.5 * (lam[1:] + lam[:-1]),
                  1.5 * lam[-1] - 0.5 * lam[-2]]
    cum = np.r_[0.0, np.cumsum(tr["object_electrons"])]
    return np.diff(np.interp(grid.edges_angstrom(), edges, cum, left=np.nan, right=np.nan))


def test_simulated_star_flux_is_unbiased_and_errors_honest(star_reductions):
    num = den = 0.0
    chi2 = []
    for f, red in star_reductions:
        assert len(red.extractions) == 1
        ex = red.extractions[0]
        truth = _truth_on_grid(f["truth"], red.rectified.grid)
        ok = (ex.mask == 0) & np.isfinite(truth)
        ok[:5] = ok[-5:] = False
        num += np.sum(ex.flux[ok] - truth[ok])
        den += np.sum(truth[ok])
        chi2.append(np.mean((ex.flux[ok] - truth[ok]) ** 2 / ex.variance[ok]))
    # issue requirements: unbiased to 0.5 %, chi2/dof between 0.9 and 1.1
    assert abs(num / den) < 0.005
    assert 0.9 < np.mean(chi2) < 1.1


def test_simulated_star_variance_near_theoretical_minimum(star_reductions):
    for f, red in star_reductions[:1]:
        ex = red.extractions[0]
        wts = red.rectified.weights
        obj = resample_rows(f["truth"].components["object"].astype(float), wts)
        true_var = resample_rows(f["true_variance"], wts, power=2)
        rows = np.arange(obj.shape[0])[:, None]
        inap = np.abs(rows - ex.trace_px[None, :]) <= red.half_widths_px[0]
        p_true = np.where(inap, obj, 0.0)
        p_true = p_true / np.where(p_true.sum(axis=0) > 0, p_true.sum(axis=0), 1.0)
        good = red.rectified.mask == 0
        bound = _minimum_variance(p_true, true_var, good=good & inap)
        ok = (ex.mask == 0) & np.isfinite(bound) & (bound > 0)
        ok[:5] = ok[-5:] = False
        ratio = np.median(ex.info["variance_pixels"][ok] / bound[ok])
        # issue requirement: within 5 % of the minimum for the true profile (pixel noise);
        # the sky model's correlated error comes on top (reported separately)
        assert abs(ratio - 1.0) < 0.05
        assert ex.info["variance_sky_term"] < 0.05


def test_flat_term_per_column_keeps_bright_star_errors_honest(rng):
    # analytic truth: the flat's relative variance falls 4x along x (a faint blue lamp),
    # the CCD step's variance rn^2 + data + c(x) data^2 carries it pixel by pixel
    from pipeline.extraction.variance import flat_term_by_column, variance_model_coefficients

    x = np.arange(NX)
    trace, prof = _profile(x)
    c_true = 4e-5 * (1 - 0.75 * x / NX)
    flux = 3e5 * np.ones(NX)
    sky, rn = 50.0, 4.0
    inap = np.abs(np.arange(NY)[:, None] - trace) <= 4.5
    truth = flux * np.where(inap, prof, 0).sum(axis=0)
    chi2 = []
    for _ in range(6):
        img = flux * prof + sky
        d = rng.poisson(img) * (1 + rng.normal(0, 1, img.shape) * np.sqrt(c_true)[None, :])
        d = d + rng.normal(0, rn, d.shape) - sky
        v = rn ** 2 + np.clip(d + sky, 0, None) + c_true * (d + sky) ** 2
        coef = variance_model_coefficients(d + sky, v)
        c_col = flat_term_by_column(d + sky, v, np.zeros(d.shape, np.uint8), coef)
        assert np.allclose(c_col[20:-20], c_true[20:-20], rtol=0.15)
        ex = extract(d, v, np.zeros(d.shape, np.uint8), trace, half_width_px=4.5,
                     background_variance=np.full(d.shape, rn ** 2 + sky),
                     signal_variance_factor=1.0,
                     signal_variance_quadratic=np.broadcast_to(c_col, d.shape),
                     sky=np.full(d.shape, sky))
        chi2.append((ex.flux - truth) ** 2 / ex.variance)
    chi2 = np.array(chi2)
    # honest on both ends (one global c would be ~2x off at x = 0 and ~0.6 at the end)
    assert 0.8 < chi2[:, :NX // 4].mean() < 1.2
    assert 0.8 < chi2[:, -NX // 4:].mean() < 1.2


def test_module_defaults_match_the_schema():
    """The step's option defaults are the schema's (one source of truth for users)."""
    from pathlib import Path

    import yaml

    from pipeline.extraction import frame

    schema = yaml.safe_load((Path(__file__).resolve().parents[1] / "config" / "schema.yaml")
                            .read_text())["properties"]
    for section, module_defaults in (("rectification", frame.RECTIFICATION_DEFAULTS),
                                     ("flexure", frame.FLEXURE_DEFAULTS),
                                     ("sky", frame.SKY_DEFAULTS),
                                     ("tracing", frame.TRACING_DEFAULTS),
                                     ("extraction", frame.EXTRACTION_DEFAULTS)):
        schema_defaults = {k: v["default"] for k, v in schema[section]["properties"].items()}
        assert schema_defaults == module_defaults, section


# ------------------------------------------------- real objects only; the target and the others
def _sky_spectrum(wave):
    """Night-sky continuum plus emission lines (invented strengths, lines of the shipped list
    region 5000-7000 A)."""
    sky = np.full(wave.size, 300.0)
    for centre, amp in ((5200, 900), (5460, 700), (5577, 4000), (5890, 2000), (6300, 3000),
                        (6363, 1200), (6500, 800), (6830, 1500)):
        sky += amp * np.exp(-0.5 * ((wave - centre) / 1.5) ** 2)
    return sky


def _slit_frame(rng, sources, *, residual=None, ny=200, nx=800, rn=4.0):
    """Rectified, sky-subtracted frame: pixel-integrated Gaussian sources (row, sigma, electrons
    per column), Poisson + read noise, plus ``residual(y) x sky`` left by a sky model."""
    from scipy.special import ndtr

    wave = np.linspace(5000.0, 7000.0, nx)
    sky = np.broadcast_to(_sky_spectrum(wave)[None, :], (ny, nx))
    y = np.arange(ny)[:, None]
    obj = np.zeros((ny, nx))
    for row, sigma, flux in sources:
        obj += flux * (ndtr((y + 0.5 - row) / sigma) - ndtr((y - 0.5 - row) / sigma))
    data = rng.poisson(obj + sky) - sky + rng.normal(0.0, rn, (ny, nx))
    if residual is not None:
        data = data + residual(np.arange(ny, dtype=float))[:, None] * sky
    variance = rn ** 2 + np.clip(data + sky, 0.0, None)
    return dict(data=data, variance=variance, mask=np.zeros((ny, nx), np.uint8), wave=wave,
                background_variance=rn ** 2 + sky, sky=sky)


def _objects(frame, **kw):
    from pipeline.extraction.frame import extract_objects

    return extract_objects(frame["data"], frame["variance"], frame["mask"], frame["wave"],
                           background_variance=frame["background_variance"],
                           signal_variance_factor=1.0, sky=frame["sky"], fwhm_guess_px=3.0,
                           **kw)


def _slit_defect_residual(y):
    """What a smooth slit-illumination model leaves of slit-width bumps and a dust dip: the
    structure minus its smoothed self (Gaussian, 4 rows), times the sky."""
    from scipy.ndimage import gaussian_filter1d

    def g(c, s):
        return np.exp(-0.5 * ((y - c) / s) ** 2)
    bumps = 0.05 * g(55, 1.2) - 0.06 * g(150, 1.0) + 0.04 * g(160, 1.3)
    return bumps - gaussian_filter1d(bumps, 4.0)


def test_bright_star_with_sky_residuals_and_slit_defects_gives_one_object():
    # truth: one star at row 100; the slit-defect residuals are found as candidates at
    # detection S/N 14-15 when nothing reviews them (the check below), as on the
    # frames of the second instrument
    frame = _slit_frame(np.random.default_rng(5), [(100.0, 1.3, 2e4)],
                        residual=_slit_defect_residual)
    loose = dict(residual_factor=0.0, min_fwhm_seeing=0.0, min_extracted_snr=0.0,
                 max_sky_fraction=1e9)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        unreviewed = _objects(frame, expected_row_px=99.5, tracing=loose)
    assert len(unreviewed.traces) >= 3 and max(t.snr for t in unreviewed.traces[1:]) > 10
    with pytest.warns(UserWarning, match="not a source"):
        objects = _objects(frame, expected_row_px=99.5)
    assert len(objects.traces) == 1 and objects.roles == ("target",)
    assert objects.traces[0].centre_px == pytest.approx(100.0, abs=0.1)
    assert len(objects.info["not_sources"]) >= 2
    # each test on its own also rejects the residuals with the strongest detections
    for alone in (dict(loose, residual_factor=1.5), dict(loose, max_sky_fraction=0.5)):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            rows = [t.centre_px for t in _objects(frame, expected_row_px=99.5,
                                                  tracing=alone).traces]
        assert not any(abs(r - 55.0) < 3 for r in rows), alone


def test_galaxy_with_a_brighter_field_star_stays_the_target():
    # truth: a faint extended galaxy (sigma 4 rows, 100 e- per column: ~10 e- per pixel at
    # its peak) near the expected row, a field star 4x brighter at row 140 and a faint
    # field star (60 e- per column) at row 175
    sources = [(60.0, 4.0, 100.0), (140.0, 1.3, 400.0), (175.0, 1.3, 60.0)]
    frame = _slit_frame(np.random.default_rng(8), sources)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        objects = _objects(frame, expected_row_px=62.0)
    rows = [t.centre_px for t in objects.traces]
    assert objects.roles == ("target", "other", "other")
    assert rows[0] == pytest.approx(60.0, abs=0.5)
    assert rows[1] == pytest.approx(140.0, abs=0.3) and rows[2] == pytest.approx(175.0, abs=0.5)
    assert objects.traces[1].snr > objects.traces[0].snr   # the star is the brighter detection
    assert not objects.info["not_sources"]                 # the real faint star is kept
    from pipeline.core.spectra import spectrum_file_name
    from pipeline.extraction.outputs import object_labels
    names = [spectrum_file_name("TRG-511", lab) for lab in object_labels(objects.roles)]
    assert names == ["TRG-511_target.fits", "TRG-511_other1.fits", "TRG-511_other2.fits"]


def test_expected_target_position_from_config_or_header():
    from astropy.io import fits

    from pipeline.core.errors import InputFileWarning
    from pipeline.extraction.frame import choose_target
    from pipeline.extraction.outputs import expected_target_offset

    assert expected_target_offset(fits.Header({"SLITOFF": "-9.4"}), keyword="SLITOFF") == -9.4
    assert expected_target_offset(fits.Header(), offset_arcsec=2.0) == 2.0
    with pytest.warns(InputFileWarning, match="SLITOFF"):
        assert expected_target_offset(fits.Header(), offset_arcsec=0.5, keyword="SLITOFF") == 0.5
    assert choose_target([128.0, 104.0], 127.5) == 0 and choose_target([128.0, 104.0], 100) == 1


def test_systematic_fraction_keeps_bright_errors_honest(rng):
    # analytic truth: a flat-field error common to the aperture's rows (1 + e, e ~ N(0, 0.4 %)
    # per run, as a slit-width ripple left in the flat does) at S/N ~ 400 per column
    x = np.arange(NX)
    trace, prof = _profile(x)
    flux = 2e5 * np.ones(NX)
    inap = np.abs(np.arange(NY)[:, None] - trace) <= 4.5
    truth = flux * np.where(inap, prof, 0).sum(axis=0)
    chi2 = {0.0: [], 0.004: [], "box": []}
    for _ in range(12):
        scale = 1.0 + rng.normal(0.0, 0.004)
        d = rng.poisson(flux * prof + 50.0) * scale - 50.0 + rng.normal(0, 4.0, prof.shape)
        v = 16.0 + np.clip(d + 50.0, 0, None)
        for frac in (0.0, 0.004):
            ex = extract(d, v, np.zeros(d.shape, np.uint8), trace, half_width_px=4.5,
                         background_variance=np.full(d.shape, 66.0), signal_variance_factor=1.0,
                         systematic_fraction=frac)
            chi2[frac].append(np.mean((ex.flux - truth) ** 2 / ex.variance))
            if frac:
                chi2["box"].append(np.mean((ex.boxcar_flux - truth) ** 2 / ex.boxcar_variance))
    assert np.mean(chi2[0.0]) > 2.0            # photon noise alone: 0.22 % vs 0.4 %
    assert 0.6 < np.mean(chi2[0.004]) < 1.5    # 12 runs of one common error each
    assert 0.6 < np.mean(chi2["box"]) < 1.5
