"""Arc line finding and centroids against injected truth and the photon-noise bound.

Truth used here:
* lines injected at known positions by the test's own renderer (a slit image, i.e. a
  box, convolved with a Gaussian and integrated over pixels; Poisson and read noise);
* the demo simulator (demo_data, independent optics code) for realistic arcs;
* the Cramer-Rao bound sigma_x^2 >= 1/I, I = sum_i (d mu_i / d x0)^2 / var_i
  (analytic: without background sigma_x ~ sqrt((sigma^2 + 1/12) / N), so N = 1e4,
  sigma = 1.5 px, B = 0 gives 0.0153 px).
"""

import math

import numpy as np
import pytest
from scipy.special import ndtr

from pipeline.core import maskbits
from pipeline.wavelength.arclines import (LineFlag, continuum_level, extract_band, find_arc_lines,
                                          read_lines_table)
from pipeline.wavelength.steps import find_arc_lines_file
from pipeline.core.errors import ArcQualityWarning, InputFileError
from pipeline.core.frames import Frame, write_frame

RN = 4.0  # e-, read noise of the injected spectra (a typical CCD; common practice)


def slit_profile(x, centre, *, width_px, sigma_px, flux):
    """Electrons per pixel of a box (slit image) of ``width_px`` convolved with a Gaussian.

    Integrated over each pixel numerically (64 sub-samples), independently of the
    closed forms in pipeline.wavelength.arclines.
    """
    sub = (np.arange(64) + 0.5) / 64 - 0.5
    t = np.asarray(x, float)[..., None] + sub - centre
    if width_px > 0:
        dens = (ndtr((t + width_px / 2) / sigma_px) - ndtr((t - width_px / 2) / sigma_px)) / width_px
    else:
        dens = np.exp(-0.5 * (t / sigma_px) ** 2) / (sigma_px * math.sqrt(2 * math.pi))
    return flux * dens.mean(axis=-1)


def spectrum_with_lines(rng, centres, fluxes, *, nx, width_px=2.8, sigma_px=0.5, background=20.0,
                        slope=0.0):
    x = np.arange(nx, dtype=float)
    model = background + slope * (x - nx / 2)
    for c, f in zip(centres, fluxes):
        sl = slice(max(0, int(c) - 15), min(nx, int(c) + 16))
        model[sl] += slit_profile(x[sl], c, width_px=width_px, sigma_px=sigma_px, flux=f)
    data = rng.poisson(np.maximum(model, 0)).astype(float) + rng.normal(0, RN, nx)
    return data, np.maximum(data, 0) + RN ** 2, model


def _match(found_x, true_x):
    idx = np.array([np.argmin(np.abs(true_x - v)) for v in found_x])
    return idx, found_x - true_x[idx]


def test_centroids_recover_injected_lines_with_honest_errors(rng):
    centres = 40 + 30 * np.arange(60) + rng.uniform(-0.5, 0.5, 60)
    fluxes = rng.uniform(3e3, 3e4, 60)
    data, var, _ = spectrum_with_lines(rng, centres, fluxes, nx=1900, width_px=0.0, sigma_px=1.2)
    lines = find_arc_lines(data, var)
    assert len(lines) == 60 and np.all(lines.flags == 0)
    _, d = _match(lines.x_px, centres)
    pulls = d / lines.x_err_px
    assert np.all(np.abs(pulls) < 5)
    assert 0.75 < np.std(pulls) < 1.3       # Gaussian profile: the fit errors are honest
    # integrated flux within its errors
    idx, _ = _match(lines.x_px, centres)
    assert np.std((lines.flux_e - fluxes[idx]) / lines.flux_err_e) < 1.5


def test_gaussian_line_reaches_the_cramer_rao_bound(rng):
    # analytic: sqrt((sigma^2 + 1/12) / N) = 0.0153 px for N = 1e4 e-, sigma = 1.5 px (without read
    # noise); with RN = 4 e- the bound is recomputed below from the Fisher information
    n, sigma, nlines = 1e4, 1.5, 300
    centres = 20 + 40 * np.arange(nlines) + rng.uniform(-0.5, 0.5, nlines)
    data, var, _ = spectrum_with_lines(rng, centres, np.full(nlines, n), nx=40 * nlines + 20,
                                       width_px=0.0, sigma_px=sigma, background=0.0)
    x = np.arange(-15.0, 16.0)
    h = 1e-4
    mu = slit_profile(x, 0.3, width_px=0, sigma_px=sigma, flux=n)
    dmu = (slit_profile(x, 0.3 + h, width_px=0, sigma_px=sigma, flux=n)
           - slit_profile(x, 0.3 - h, width_px=0, sigma_px=sigma, flux=n)) / (2 * h)
    bound = 1 / math.sqrt(np.sum(dmu ** 2 / (mu + RN ** 2)))
    no_rn = 1 / math.sqrt(np.sum(dmu ** 2 / mu))
    assert no_rn == pytest.approx(math.sqrt((sigma ** 2 + 1 / 12) / n), abs=0.0003)  # 0.0153 px
    lines = find_arc_lines(data, var, detection_snr=10)
    _, d = _match(lines.x_px, centres)
    assert len(lines) == nlines
    assert np.std(d) < 1.15 * bound
    assert np.median(lines.x_err_px) == pytest.approx(bound, rel=0.1)


def test_simulated_isolated_lines_within_1p5_of_the_photon_noise_bound():
    import demo_data.simulate as sim
    inst = sim.make_instrument()
    kw = dict(lamps="HgAr,Ne", poisson=False, read_noise=False, cosmic_rays=False)
    arc = sim.make_arc(inst, 8.93, **kw)
    h = 0.02  # binned px; flexure moves the whole pattern, so it differentiates w.r.t. x0
    plus = sim.make_arc(inst, 8.93, flexure_x_px=h, **kw).truth.expected_e
    minus = sim.make_arc(inst, 8.93, flexure_x_px=-h, **kw).truth.expected_e
    rows = slice(123, 134)  # the central band of 11 rows
    mu = np.maximum(arc.truth.expected_e[rows].sum(axis=0), 0)
    dmu = (plus[rows].sum(axis=0) - minus[rows].sum(axis=0)) / (2 * h)
    rn2 = inst.detector.read_noise_e ** 2 * 11
    info = arc.truth.info["lines"]
    waves = np.asarray(info["wavelength_air_angstrom"])
    x_true = np.asarray(info["x_px_per_row"])[:, rows].mean(axis=1)
    flux_tot = np.asarray(info["electrons_total"])
    # isolated: no other simulated line within 12 px carrying > 0.1 % of its flux
    iso = [i for i in range(waves.size) if 20 < x_true[i] < 1004 and not np.any(
        (np.abs(x_true - x_true[i]) < 12) & (np.arange(waves.size) != i)
        & (flux_tot > 1e-3 * flux_tot[i]))]
    iso = [i for i in iso if mu[int(round(x_true[i]))] > 2000]  # well above the threshold
    assert len(iso) >= 5
    rng = np.random.default_rng(7)
    found = {i: [] for i in iso}
    for _ in range(40):
        data = rng.poisson(mu).astype(float) + rng.normal(0, math.sqrt(rn2), mu.size)
        lines = find_arc_lines(data, np.maximum(data, 0) + rn2)
        for i in iso:
            k = np.argmin(np.abs(lines.x_px - x_true[i]))
            if abs(lines.x_px[k] - x_true[i]) < 1:
                found[i].append(lines.x_px[k])
    for i in iso:
        win = slice(int(round(x_true[i])) - 8, int(round(x_true[i])) + 9)
        bound = 1 / math.sqrt(np.sum(dmu[win] ** 2 / (mu[win] + rn2)))
        assert len(found[i]) == 40
        scatter = np.std(found[i], ddof=1)
        assert scatter < 1.5 * bound, (waves[i], scatter, bound)
        # and no centroid bias beyond the noise (simulator truth)
        assert abs(np.mean(found[i]) - x_true[i]) < 0.01 + 3 * bound / math.sqrt(40)


def test_blends_saturation_edges_and_masks_are_flagged(rng):
    nx = 600
    centres = np.array([3.0, 100.0, 104.2, 200.0, 201.6, 300.0, 400.0, 500.0])
    fluxes = np.array([2e4, 2e4, 1.5e4, 2e4, 2e4, 2e4, 2e4, 2e4])
    data, var, _ = spectrum_with_lines(rng, centres, fluxes, nx=nx)
    mask = np.zeros(nx, dtype=np.uint8)
    mask[300] = maskbits.MaskBit.SATURATED
    mask[402] = maskbits.MaskBit.BAD_PIXEL
    lines = find_arc_lines(data, var, mask=mask)

    def flag_near(x):
        k = np.argmin(np.abs(lines.x_px - x))
        assert abs(lines.x_px[k] - x) < 1.5
        return lines.flags[k]

    assert flag_near(3.0) & LineFlag.EDGE
    assert flag_near(100.0) & LineFlag.BLENDED and flag_near(104.2) & LineFlag.BLENDED
    assert flag_near(200.8) & LineFlag.BLENDED            # unresolved pair: one broad line
    assert flag_near(300.0) & LineFlag.SATURATED
    assert flag_near(400.0) & LineFlag.MASKED
    assert flag_near(500.0) == 0
    assert LineFlag.describe(LineFlag.SATURATED | LineFlag.BLENDED) == ["SATURATED", "BLENDED"]


def test_continuum_and_scattered_light_are_removed(rng):
    nx = 1000
    centres = 30 + 47.3 * np.arange(20)
    data, var, model = spectrum_with_lines(rng, centres, np.full(20, 2e4), nx=nx,
                                           background=800.0, slope=0.6)
    cont = continuum_level(data)
    truth = 800.0 + 0.6 * (np.arange(nx) - nx / 2)
    assert np.median(np.abs(cont - truth)[50:-50]) < 15  # ~2 % of the level
    lines = find_arc_lines(data, var)
    assert len(lines) == 20
    _, d = _match(lines.x_px, centres)
    assert np.max(np.abs(d)) < 0.05


def test_extract_band_replaces_masked_pixels():
    ny, nx = 21, 50
    data = np.ones((ny, nx)) * np.arange(nx)[None, :]
    var = np.ones((ny, nx))
    mask = np.zeros((ny, nx), dtype=np.uint8)
    mask[10, 5] = maskbits.MaskBit.COSMIC_RAY
    mask[:, 7] = maskbits.MaskBit.BAD_PIXEL
    mask[9, 9] = maskbits.MaskBit.SATURATED
    band = extract_band(data, var, mask, half_width_rows=2)
    assert band.rows == (8, 12)
    assert band.flux[5] == pytest.approx(5 * 5)          # scaled mean of the 4 good rows
    assert band.variance[5] == pytest.approx(4 * (5 / 4) ** 2)
    assert band.mask[7] & maskbits.MaskBit.BAD_PIXEL and np.isinf(band.variance[7])
    assert band.mask[9] & maskbits.MaskBit.SATURATED
    assert band.mask[5] == 0
    with pytest.raises(ValueError, match="`center_row`"):
        extract_band(data, var, mask, center_row=40)


def test_noise_only_gives_no_lines_and_bad_input_raises(rng):
    data = rng.normal(100, 10, 500)
    assert len(find_arc_lines(data, np.full(500, 100.0))) == 0
    with pytest.raises(ValueError, match="`flux` must be 1-D"):
        find_arc_lines(np.zeros((2, 400)), np.zeros((2, 400)))
    with pytest.raises(ValueError, match="`variance` must have 400"):
        find_arc_lines(np.zeros(400), np.zeros(300))


def test_file_adapter_round_trip(tmp_path, rng):
    ny, nx = 31, 400
    centres = np.array([50.3, 150.7, 260.1, 333.3])
    rows = []
    for _ in range(ny):
        d, _, _ = spectrum_with_lines(rng, centres, np.full(4, 3e3), nx=nx)
        rows.append(d)
    data = np.array(rows, dtype=np.float32)
    from astropy.io import fits
    header = fits.Header({"LAMPS": "HgAr,Ne", "GRTILT": 8.93, "BINSPEC": 2})
    frame = Frame(data, np.maximum(data, 0) + RN ** 2, np.zeros(data.shape, np.uint8), header)
    arc = write_frame(frame, tmp_path / "arc.fits")
    out = tmp_path / "wavelength" / "arc_lines.ecsv"
    find_arc_lines_file(arc=str(arc), lines=str(out))
    back = read_lines_table(out)
    assert len(back) == 4
    np.testing.assert_allclose(back.x_px, centres, atol=0.03)
    assert back.info["LAMPS"] == "HgAr,Ne" and back.info["band_first_row"] == 10
    # a file that is not a frame: message names the file
    bad = tmp_path / "bad.fits"
    bad.write_bytes(b"not fits")
    with pytest.raises(InputFileError, match="bad.fits"):
        find_arc_lines_file(arc=str(bad), lines=str(tmp_path / "x.ecsv"))
    # no lines: a warning, and an empty table is still written
    flat = Frame(np.full((ny, nx), 50, np.float32), np.full((ny, nx), 66, np.float32),
                 np.zeros((ny, nx), np.uint8), header)
    write_frame(flat, tmp_path / "flat.fits")
    with pytest.warns(ArcQualityWarning, match="no arc line"):
        find_arc_lines_file(arc=str(tmp_path / "flat.fits"), lines=str(tmp_path / "e.ecsv"))
    assert len(read_lines_table(tmp_path / "e.ecsv")) == 0
    with pytest.raises(InputFileError, match="lacks column"):
        (tmp_path / "t.ecsv").write_text("# %ECSV 1.0\n# ---\n# datatype:\n# - {name: a, datatype: int64}\na\n1\n")
        read_lines_table(tmp_path / "t.ecsv")
