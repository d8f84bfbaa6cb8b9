"""Object finding and tracing (pipeline/extraction/trace.py).

Truth used here:
* demo-simulator truth (independent code): the trace centre of the star in
  every detector column (``info['trace']['trace_y_px']``, binned rows), its
  noise-free image (to build a two-object slit), the exact wavelength map;
* analytic profiles (Gaussians) for the detection threshold.
"""

import warnings

import numpy as np
import pytest

from pipeline.extraction.rectify import rectify, wavelength_grid
from pipeline.extraction.sky import fit_sky, subtract_sky
from pipeline.extraction.detect import find_objects, object_mask
from pipeline.extraction.trace import (Trace, TracingWarning, trace_frame, traces_from_table,
                                       traces_to_table)


def _rectified(f, extra_object=None):
    """Sky-subtracted, rectified simulator frame (truth wavelengths, no flexure error)."""
    data, var = f["data"], f["variance"]
    wave = f["truth"].wavelength_map()
    if extra_object is not None:
        rng = np.random.default_rng(5)
        add = rng.poisson(extra_object) / f["response"]
        data = data + add
        var = var + extra_object / f["response"] ** 2
    sky_pixels, _ = object_mask(data, var, f["mask"], wave, fwhm_guess_px=3.0)
    model = fit_sky(data, var, f["mask"], wave, sky_pixels)
    d, v, m = subtract_sky(data, var, f["mask"], model)
    grid = wavelength_grid(wave)
    return rectify(d, v, m, wave, grid), wave


@pytest.fixture(scope="module")
def standard():
    from test_sky import simulated_frame
    return simulated_frame("TRS-17", exptime_s=60.0, seed=31, flexure_x_px=0.0,
                           frame_type="STANDARD")


@pytest.fixture(scope="module")
def standard_trace(standard):
    rect, _ = _rectified(standard)
    traces = trace_frame(rect.data, rect.variance, rect.mask, rect.grid.centres_angstrom(),
                         fwhm_guess_px=3.0)
    return rect, traces


def _truth_trace_on_grid(truth, grid):
    tr = truth.info["trace"]
    return np.interp(grid.centres_angstrom(), tr["wavelength_angstrom"], tr["trace_y_px"])


def test_bright_star_trace_matches_truth(standard, standard_trace):
    rect, traces = standard_trace
    assert len(traces) == 1
    tr = traces[0]
    assert tr.mode == "own"
    truth = _truth_trace_on_grid(standard["truth"], rect.grid)
    resid = tr.position_px(rect.grid.centres_angstrom()) - truth
    # the simulated drift is 2.4 rows end to end; recovered to a few hundredths of a row
    assert np.ptp(truth) > 1.5
    assert np.sqrt(np.mean(resid ** 2)) < 0.03
    # FWHM: simulator seeing 1.1" at 5000 A over 0.4"/row -> 2.75 rows (lambda^-0.2)
    assert tr.fwhm_px == pytest.approx(2.75, rel=0.15)


def test_faint_object_borrows_the_reference_shape(standard_trace):
    from test_sky import simulated_frame

    _, std_traces = standard_trace
    reference = std_traces[0]
    # slit with the faint star TRV-9 (y ~ 140) and a copy 80 times fainter 40 rows lower
    # (detection S/N of the whole collapsed profile: ~1500 for TRV-9, ~20 for the copy)
    f = simulated_frame("TRV-9", exptime_s=900.0, seed=41, flexure_x_px=0.0)
    faint = simulated_frame("TRV-9", exptime_s=900.0, seed=42, flexure_x_px=0.0,
                            trace_y_px=100.0, object_scale=0.012, sky=False)
    extra = faint["truth"].components["object"].astype(float)
    rect, _ = _rectified(f, extra_object=extra)
    wave = rect.grid.centres_angstrom()
    traces = trace_frame(rect.data, rect.variance, rect.mask, wave, fwhm_guess_px=3.0,
                         own_trace_snr=30.0, reference=reference, reference_name="std")
    assert len(traces) == 2
    bright, weak = traces
    assert bright.mode == "own" and abs(bright.centre_px - 141) < 2
    assert weak.mode == "reference" and weak.reference == "std"
    assert 5.0 <= weak.snr < 30.0
    truth = _truth_trace_on_grid(faint["truth"], rect.grid)
    resid = weak.position_px(wave) - truth
    # shape from the standard (same drift law in the simulator), offset fitted
    assert np.sqrt(np.mean(resid ** 2)) < 0.25  # offset error ~0.1 row at S/N 20; drift 2.4 rows


def test_detection_threshold(rng):
    y = np.arange(200.0)
    sigma = 1.2
    noise = 1.0

    def profile(amp, centre):
        return amp * np.exp(-0.5 * ((y - centre) / sigma) ** 2)

    # matched-filter S/N of a Gaussian of amplitude A in white noise (analytic):
    # A * sqrt(sqrt(pi) * sigma_eff) / ..., here simply check well above / well below
    strong = profile(8.0, 60.0) + profile(1.0, 150.0)
    false_alarms = 0
    for _ in range(20):
        prof = strong + rng.normal(0, noise, y.size)
        dets = find_objects(prof, fwhm_guess_px=2.8, snr_min=5.0)
        positions = [d.position_px for d in dets]
        assert any(abs(p - 60) < 0.5 for p in positions)
        false_alarms += sum(abs(p - 60) > 5 and abs(p - 150) > 5 for p in positions)
    assert false_alarms == 0
    # pure noise: nothing above 5 sigma
    assert find_objects(rng.normal(0, 1, 200), fwhm_guess_px=2.8, snr_min=5.0) == []


def test_shoulder_of_an_extended_profile_is_not_an_object(rng):
    y = np.arange(200.0)
    prof = 20 * np.exp(-np.abs(y - 100) / 5.0) + 1.5 * np.exp(-0.5 * ((y - 117) / 2.0) ** 2)
    prof = prof + rng.normal(0, 0.1, y.size)
    dets = find_objects(prof, fwhm_guess_px=3.0, snr_min=5.0)
    assert len(dets) == 1 and abs(dets[0].position_px - 100) < 1


def test_object_without_reference_gets_a_fixed_trace_and_a_warning(rng):
    y = np.arange(80.0)[:, None]
    data = 3.0 * np.exp(-0.5 * ((y - 40) / 1.3) ** 2) * np.ones((1, 300))
    data = data + rng.normal(0, 1.0, data.shape)
    var = np.ones(data.shape)
    wave = np.linspace(5000, 6000, 300)
    with pytest.warns(TracingWarning, match="constant row"):
        traces = trace_frame(data, var, np.zeros(data.shape, np.uint8), wave,
                             fwhm_guess_px=3.0, own_trace_snr=1e9)
    assert len(traces) == 1 and traces[0].mode == "fixed"
    assert traces[0].centre_px == pytest.approx(40.0, abs=0.5)


def test_trace_table_round_trip():
    traces = [Trace(np.array([120.0, 1.2, -0.3, 0.05]), (4000.0, 6000.0), 2.8, 300.0),
              Trace(np.array([80.0]), (4000.0, 6000.0), 3.1, 6.0, "fixed")]
    back = traces_from_table(traces_to_table(traces, frame_id="f1", object_name="X"))
    wave = np.linspace(4000, 6000, 7)
    for a, b in zip(traces, back):
        np.testing.assert_allclose(a.position_px(wave), b.position_px(wave))
        assert a.mode == b.mode and a.fwhm_px == b.fwhm_px


def test_saturated_cores_do_not_widen_the_fwhm(rng):
    # analytic truth: pixel-integrated Gaussian, sigma 1.2 rows; a Gaussian fitted to it
    # has sigma^2 = 1.2^2 + 1/12 (pixel width), FWHM = 2.3548 * 1.234 = 2.906 rows
    from scipy.special import ndtr
    from pipeline.core.maskbits import MaskBit
    from pipeline.extraction.trace import trace_object

    ny, nx = 40, 480
    rows = np.arange(ny)[:, None]
    prof = ndtr((rows + 0.5 - 20.0) / 1.2) - ndtr((rows - 0.5 - 20.0) / 1.2)
    flux = 2.0e5 * (1 + 0.5 * np.sin(np.arange(nx) / 9.0))  # saturates in some columns only
    img = flux[None, :] * prof + 100.0
    data = rng.normal(img, np.sqrt(img + 16.0))
    var = 16.0 + np.clip(data, 0, None)
    mask = np.where(data > 8.0e4, MaskBit.SATURATED, 0).astype(np.uint8)
    assert 0.1 < np.mean(mask[20] > 0) < 0.9  # partly saturated bins exist
    tr = trace_object(data - 100.0, var, mask, np.linspace(5000, 6000, nx), 20.0,
                      fwhm_guess_px=3.0)
    assert tr.fwhm_px == pytest.approx(2.3548 * np.sqrt(1.2 ** 2 + 1 / 12), rel=0.01)
    assert tr.info["n_bins_saturated"] > 0


def _mask_blue_block(f, fraction):
    """Copy of a simulated frame with its first ``fraction`` of columns unilluminated.

    Like the blue end of the full-size detector, where the flat lamp gives too little
    light and the CCD step sets UNILLUMINATED in every row: the pixels there hold
    only noise around zero.
    """
    from pipeline.core.maskbits import MaskBit

    n_cut = int(round(fraction * f["data"].shape[1]))
    g = dict(f)
    data, var, mask = f["data"].copy(), f["variance"].copy(), f["mask"].copy()
    data[:, :n_cut] = np.random.default_rng(7).normal(0.0, 3.0, data[:, :n_cut].shape)
    var[:, :n_cut] = 9.0
    mask[:, :n_cut] |= np.uint8(MaskBit.UNILLUMINATED)
    g.update(data=data, variance=var, mask=mask)
    return g, n_cut


def test_profile_of_a_frame_with_a_masked_block_of_columns(rng):
    # analytic truth: a Gaussian star at row 30.0 (sigma 1.3 rows) on 60 rows; the first
    # 60 % of the columns masked in every row, a few whole rows masked (bad columns)
    from pipeline.core.maskbits import MaskBit
    from pipeline.extraction.detect import spatial_profile

    ny, nx = 60, 500
    rows = np.arange(ny)[:, None]
    img = 400.0 * np.exp(-0.5 * ((rows - 30.0) / 1.3) ** 2) * np.ones((1, nx))
    data = rng.normal(img, 5.0)
    var = np.full(data.shape, 25.0)
    mask = np.zeros(data.shape, np.uint8)
    mask[:, :300] = MaskBit.UNILLUMINATED
    mask[[10, 45]] |= np.uint8(MaskBit.BAD_PIXEL)
    data[:, :300] = 0.0
    data[[10, 45]] = 1.0e4  # garbage in the bad rows must not come through
    prof = spatial_profile(data, var, mask)
    dets = find_objects(prof, fwhm_guess_px=3.0)
    assert len(dets) == 1
    assert dets[0].position_px == pytest.approx(30.0, abs=0.05)
    assert prof[10] < 50 and prof[45] < 50  # interpolated from the neighbours (truth ~0)
    assert prof[30] == pytest.approx(400.0, rel=0.03)  # median of 200 values, sigma 5


def test_standard_with_unilluminated_blue_end_is_masked_and_traced(standard):
    # the full-size detector's blue end: the first ~14 % of the columns are unilluminated;
    # here 20 %, more than one of the 8 drift blocks of object_mask. Truth: the simulator's
    # trace centre in every column.
    f, n_cut = _mask_blue_block(standard, 0.20)
    wave = f["truth"].wavelength_map()
    sky_pixels, dets = object_mask(f["data"], f["variance"], f["mask"], wave,
                                   fwhm_guess_px=3.0)
    assert len(dets) == 1
    truth_y = np.asarray(f["truth"].info["trace"]["trace_y_px"], float)
    # the star is masked (not sky) along its true trace in every illuminated column
    cols = np.arange(n_cut, f["data"].shape[1])
    assert not sky_pixels[np.round(truth_y[cols]).astype(int), cols].any()
    assert sky_pixels.mean() > 0.7  # and the rest of the slit is sky
    rect, _ = _rectified(f)
    traces = trace_frame(rect.data, rect.variance, rect.mask, rect.grid.centres_angstrom(),
                         fwhm_guess_px=3.0)
    assert len(traces) == 1 and traces[0].mode == "own"
    lam = rect.grid.centres_angstrom()
    lit = lam > wave[:, n_cut].max()  # wavelengths seen by illuminated columns in every row
    truth = _truth_trace_on_grid(f["truth"], rect.grid)
    resid = traces[0].position_px(lam[lit]) - truth[lit]
    assert np.sqrt(np.mean(resid ** 2)) < 0.03  # as the unmasked frame (same star)
