"""Rectification (pipeline/extraction/rectify.py).

Truth used here:
* a synthetic frame whose pixels hold the exact integral of an analytic
  spectrum over each pixel's wavelength range (antiderivative in closed form),
  for flux conservation;
* Monte Carlo noise of known variance, for the variance and its covariance;
* astropy.wcs, which evaluates the written FITS WCS (Greisen et al. 2006)
  independently of the grid code;
* demo-simulator truth: a noise-free night-sky frame with tilted and curved
  lines and its exact wavelength map (straight slit after rectification).
"""

import numpy as np
import pytest
from astropy.io import fits
from astropy.wcs import WCS
from scipy.special import erf

from pipeline.core.frames import Frame, read_frame, write_frame
from pipeline.core.maskbits import MaskBit
from pipeline.extraction.rectify import (WavelengthGrid, pixel_edges_angstrom, rectify, resample_rows,
                              resampling_weights, slit_wcs_cards, wavelength_grid)

NY, NX = 30, 500


def _wave_map():
    x = np.arange(NX, dtype=float)
    y = np.arange(NY, dtype=float)[:, None]
    # dispersion 1.9 A/px with curvature, tilted and curved lines along the slit
    return 4500.0 + 1.9 * x + 1.5e-4 * x ** 2 + 0.04 * (y - 15) + 2e-3 * (y - 15) ** 2


def _antiderivative(lam):
    """Integral of f(lam) = 40 + 10 sin(lam / 30) + 3000 N(5100, 2.2) from 0 to lam."""
    return (40.0 * lam - 300.0 * np.cos(lam / 30.0)
            + 3000.0 * 0.5 * (1 + erf((lam - 5100.0) / (2.2 * np.sqrt(2)))))


def _exact_frame(wave):
    edges = pixel_edges_angstrom(wave)
    return np.diff(_antiderivative(edges), axis=1)


@pytest.mark.parametrize("log", [False, True])
def test_flux_is_conserved_over_any_interval(log):
    wave = _wave_map()
    data = _exact_frame(wave)
    grid = wavelength_grid(wave, log=log)
    r = rectify(data, np.ones_like(data), np.zeros(data.shape, np.uint8), wave, grid)
    edges = grid.edges_angstrom()
    covered = np.all(r.mask == 0, axis=0)
    cols = np.flatnonzero(covered)
    rng = np.random.default_rng(3)
    centres = grid.centres_angstrom()
    smooth = np.abs(edges - 5100.0) > 10.0  # edges at least 4.5 sigma from the narrow line
    n_tested = 0
    while n_tested < 50:  # random intervals of 5 to 300 output pixels
        j0 = rng.integers(cols[0], cols[-1] - 300)
        j1 = j0 + rng.integers(5, 300)
        if not (smooth[j0] and smooth[j1]):
            continue
        n_tested += 1
        exact = _antiderivative(edges[j1]) - _antiderivative(edges[j0])
        got = r.data[:, j0:j1].sum(axis=1)
        # issue requirement: the sum over any wavelength interval preserved to 0.1 %
        np.testing.assert_allclose(got, exact, rtol=1e-3)
    # the whole narrow line (sigma = 1.2 px) keeps its flux too
    j0, j1 = int(grid.pixel_of(5085.0)), int(grid.pixel_of(5115.0))
    line = r.data[:, j0:j1].sum(axis=1) - (_antiderivative(edges[j1]) - _antiderivative(edges[j0])
                                           - 3000.0)
    np.testing.assert_allclose(line, 3000.0, rtol=1e-3)
    # bin by bin, the piecewise-constant model is within 1 % of the analytic integral where
    # the spectrum is resolved (inside the unresolved line it is not: see the module notes)
    exact_bins = np.diff(_antiderivative(edges))
    resolved = covered & (np.abs(centres - 5100.0) > 10.0)
    np.testing.assert_allclose(r.data[:, resolved], np.broadcast_to(exact_bins, r.data.shape)[:, resolved],
                               rtol=0.01)


def test_variance_and_covariance_against_monte_carlo():
    rng = np.random.default_rng(7)
    wave = _wave_map()[:4]
    grid = wavelength_grid(wave)
    sigma = rng.uniform(1.0, 3.0, wave.shape)
    weights = resampling_weights(wave, grid)
    draws = np.array([resample_rows(rng.normal(0.0, sigma), weights) for _ in range(3000)])
    r = rectify(np.zeros(wave.shape), sigma ** 2, np.zeros(wave.shape, np.uint8), wave, grid)
    ok = r.mask == 0
    # per-pixel variance: exact (Monte Carlo error of 3000 draws 2.6 %: 4.6 sigma here)
    np.testing.assert_allclose(draws.var(axis=0)[ok], r.variance[ok], rtol=0.12)
    assert np.mean(draws.var(axis=0)[ok] / r.variance[ok]) == pytest.approx(1.0, abs=0.01)
    # long sums along the dispersion: VARCORR is the ratio of true to naive variance
    sums = draws[:, :, 20:-20].sum(axis=2)
    naive = r.variance[:, 20:-20].sum(axis=1)
    assert np.mean(sums.var(axis=0) / naive) == pytest.approx(r.info["variance_correlation"],
                                                              rel=0.05)
    assert 1.2 < r.info["variance_correlation"] < 2.0


def test_masked_pixels_stay_masked_and_edges_are_flagged():
    wave = _wave_map()
    data = _exact_frame(wave)
    mask = np.zeros(data.shape, np.uint8)
    mask[10, 200] = MaskBit.COSMIC_RAY
    grid = wavelength_grid(wave, start_angstrom=4400.0)  # starts before the frame
    r = rectify(data, np.ones_like(data), mask, wave, grid)
    lo, hi = pixel_edges_angstrom(wave)[10, 200:202]
    edges = grid.edges_angstrom()
    touched = np.flatnonzero((edges[1:] > lo) & (edges[:-1] < hi))
    assert touched.size >= 1
    assert np.all(r.mask[10, touched] & MaskBit.COSMIC_RAY)
    assert np.sum((r.mask & MaskBit.COSMIC_RAY) != 0) == touched.size
    first_cov = pixel_edges_angstrom(wave)[:, 0].max()
    uncovered = edges[:-1] < first_cov - 30
    assert np.all(r.mask[:, uncovered] & MaskBit.NO_COVERAGE)
    assert np.all(r.data[:, uncovered] == 0) and np.all(r.variance[:, uncovered] == 0)
    assert mask[10, 200] == MaskBit.COSMIC_RAY and mask.sum() == MaskBit.COSMIC_RAY  # input kept


def test_nonfinite_input_is_flagged_not_spread():
    wave = _wave_map()
    data = _exact_frame(wave)
    data[5, 100] = np.nan
    r = rectify(data, np.ones_like(data), np.zeros(data.shape, np.uint8), wave,
                wavelength_grid(wave))
    assert np.all(np.isfinite(r.data))
    assert np.sum((r.mask & MaskBit.NONFINITE) != 0) >= 1


@pytest.mark.parametrize("log", [False, True])
def test_written_wcs_is_read_by_astropy(tmp_path, log):
    wave = _wave_map()
    grid = wavelength_grid(wave, log=log)
    r = rectify(_exact_frame(wave), np.ones(wave.shape), np.zeros(wave.shape, np.uint8), wave,
                grid)
    header = fits.Header()
    for card in grid.wcs_cards(axis=1) + slit_wcs_cards(NY, 0.4, axis=2):
        header[card[0]] = card[1:]
    header["WCSAXES"] = 2
    path = write_frame(Frame(r.data, r.variance, r.mask, header), tmp_path / "rect.fits")
    back = read_frame(path)
    assert back.header["CTYPE1"] == ("AWAV-LOG" if log else "AWAV")  # Greisen et al. 2006
    assert back.header["CUNIT1"] == "Angstrom" and back.header["CUNIT2"] == "arcsec"
    w = WCS(back.header)
    j = np.arange(grid.n_pix)
    spec, slit = w.pixel_to_world(j, np.full(j.size, (NY - 1) / 2.0))
    np.testing.assert_allclose(spec.to_value("Angstrom"), grid.centres_angstrom(), rtol=1e-10)
    np.testing.assert_allclose(slit.to_value("arcsec"), 0.0, atol=1e-9)
    _, top = w.pixel_to_world(0, NY - 1)
    assert top.to_value("arcsec") == pytest.approx(0.4 * (NY - 1) / 2)
    again = WavelengthGrid.from_header(back.header)
    assert again.log == log and again.n_pix == grid.n_pix
    np.testing.assert_allclose(again.centres_angstrom(), grid.centres_angstrom(), rtol=1e-12)


def test_grids_of_one_setup_align():
    wave = _wave_map()
    g1 = wavelength_grid(wave)
    g2 = wavelength_grid(wave + 0.37)  # another arc of the same setup
    assert g1.step == g2.step
    offset = (g2.start_angstrom - g1.start_angstrom) / g1.step
    assert offset == pytest.approx(round(offset), abs=1e-9)


def test_straight_slit_on_simulated_sky():
    import demo_data.simulate as sim
    inst = sim.make_instrument()
    frame = sim.make_science(inst, 8.93, target=None, exptime_s=600.0, poisson=False,
                             read_noise=False, cosmic_rays=False, flexure_x_px=0.0)
    sky = frame.truth.components["sky"].astype(float)
    wave = frame.truth.wavelength_map()
    grid = wavelength_grid(wave)
    r = rectify(sky, sky, np.zeros(sky.shape, np.uint8), wave, grid)
    lam0 = 5577.339  # [O I], tests/reference/sky_lines_air.csv (ASDq)
    j = int(round(grid.pixel_of(lam0)))
    cols = slice(j - 4, j + 5)
    w = grid.centres_angstrom()[cols]
    rows = slice(20, 236)
    cont = np.median(r.data[rows, j + 8:j + 20], axis=1, keepdims=True)
    line = np.clip(r.data[rows, cols] - cont, 0, None)
    centroid = np.sum(line * w, axis=1) / np.sum(line, axis=1)
    before = frame.truth.line_x_px(lam0)[rows]  # detector x of the line in every row
    assert np.ptp(before) > 0.8  # tilt and curvature: about a pixel over the slit
    # after rectification the line is a column at its wavelength (same in every row)
    assert np.ptp(centroid) < 0.02 * grid.step
    assert np.mean(centroid) == pytest.approx(lam0, abs=0.05 * grid.step)


def test_bad_input_is_named():
    wave = _wave_map()
    grid = wavelength_grid(wave)
    with pytest.raises(ValueError, match="row 0 does not increase"):
        rectify(np.ones(wave.shape), np.ones(wave.shape), np.zeros(wave.shape, np.uint8),
                wave[:, ::-1], grid)
    with pytest.raises(ValueError, match="`mask` must have the shape"):
        rectify(np.ones(wave.shape), np.ones(wave.shape), np.zeros((2, 2), np.uint8), wave, grid)
    with pytest.raises(ValueError, match="`step`"):
        WavelengthGrid(5000.0, -1.0, 10)
