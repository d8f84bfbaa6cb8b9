"""Tests of the grating-equation model against published formulas and check values.

Truth used here:
* ``grating_checks.csv`` (tests/reference, copied from ../shared/reference): values
  computed independently from the formulas in that folder's README (source key
  ``computed``);
* numerical derivatives of the grating equation (analytic truth, independent of the
  closed forms used in pipeline.wavelength.grating);
* astropy.wcs (WCSLIB) evaluating the FITS grating algorithm of Greisen et al. 2006.
"""

import csv
import math
import warnings
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits
from astropy.wcs import WCS
from numpy.testing import assert_allclose

from pipeline.wavelength import grating as gr
from pipeline.core.errors import ConfigError, OrderOverlapWarning

REPO = Path(__file__).resolve().parents[1]

# Nominal RLS optics from config/instruments/rls.yaml (the demo instrument, invented).
RLS = dict(groove_density_per_mm=600, order=1, camera_collimator_angle_deg=30.0,
           camera_focal_length_mm=250.0, pixel_size_um=15.0, collimated_beam_mm=60.0,
           blaze_wavelength_angstrom=5500.0,
           order_blocking_filters={"NONE": None, "GG395": 3950.0, "GG495": 4950.0})


def _reference_file(name):
    for folder in (REPO / "tests" / "reference", REPO.parent / "shared" / "reference"):
        if (folder / name).exists():
            return folder / name
    pytest.skip(f"reference table {name} not found in tests/reference or ../shared/reference")


def _rows(name):
    with open(_reference_file(name)) as stream:
        return list(csv.DictReader(line for line in stream if not line.startswith("#")))


def _f(row, key):
    return float(row[key]) if row[key] not in ("", None) else None


def _computed(row):
    """Evaluate one check row with the pipeline's functions."""
    q = row["quantity"]
    G = _f(row, "groove_density_per_mm")
    m = int(row["order"]) if row["order"] else None
    lam = _f(row, "wavelength_angstrom")
    alpha, beta = _f(row, "alpha_deg"), _f(row, "beta_deg")
    if q == "beta":
        return gr.diffraction_angle_deg(lam, alpha, groove_density_per_mm=G, order=m)
    if q == "angular_dispersion":
        value = gr.angular_dispersion_rad_per_angstrom(beta, groove_density_per_mm=G, order=m)
        return math.degrees(value) if row["unit"] == "deg/A" else value
    if q == "reciprocal_linear_dispersion":
        return gr.reciprocal_linear_dispersion(beta, groove_density_per_mm=G, order=m,
                                               focal_length_mm=_f(row, "camera_focal_mm"))
    if q == "resolving_power":
        return gr.grating_resolving_power(groove_density_per_mm=G, order=m,
                                          illuminated_width_mm=_f(row, "illuminated_width_mm"))
    if q == "wavelength":
        return gr.grating_wavelength(alpha, beta, groove_density_per_mm=G, order=m)
    if q == "littrow_angle":
        return gr.littrow_angle_deg(lam, groove_density_per_mm=G, order=m)
    if q == "blaze_wavelength_littrow":
        return gr.blaze_wavelength(_f(row, "blaze_angle_deg"), groove_density_per_mm=G, order=m)
    if q == "blaze_wavelength":
        return gr.blaze_wavelength(_f(row, "blaze_angle_deg"), groove_density_per_mm=G, order=m,
                                   deviation_deg=alpha - beta)
    if q == "free_spectral_range":
        return gr.free_spectral_range(lam, order=m)
    if q == "order_at_blaze":
        return gr.order_at_blaze(lam, groove_density_per_mm=G,
                                 blaze_angle_deg=_f(row, "blaze_angle_deg"))
    if q == "required_resolving_power":
        # He I 6678.15 vs Ne I 6678.2766 (shipped line list): R = lambda / d lambda
        return 0.5 * (6678.15 + 6678.2766) / (6678.2766 - 6678.15)
    if q == "required_illuminated_width":
        # invert R = m G W for W with the R of the row above
        r_needed = 0.5 * (6678.15 + 6678.2766) / (6678.2766 - 6678.15)
        return r_needed / gr.grating_resolving_power(groove_density_per_mm=G, order=m,
                                                     illuminated_width_mm=1.0)
    raise AssertionError(f"no check implemented for quantity {q!r} ({row['case_id']})")


def test_grating_check_table():
    rows = _rows("grating_checks.csv")
    assert len(rows) == 30  # README: 30 rows
    for row in rows:
        expected = float(row["value"])
        got = float(_computed(row))
        # the table gives 10 significant digits (source: computed, README formulas)
        assert got == pytest.approx(expected, rel=2e-9, abs=1e-9), (row["case_id"], row["quantity"])


def test_resolving_power_equals_w_sin_sum_over_lambda():
    # G1 row note: R = m N = W (sin a + sin b) / lambda = 30000 for W = 50 mm (source: computed)
    beta = gr.diffraction_angle_deg(5000.0, 10.0, groove_density_per_mm=600, order=1)
    r = 50e7 * (math.sin(math.radians(10)) + math.sin(math.radians(beta))) / 5000.0
    assert r == pytest.approx(30000.0, rel=1e-12)
    assert gr.grating_resolving_power(groove_density_per_mm=600, order=1,
                                      illuminated_width_mm=50) == pytest.approx(r, rel=1e-12)


def test_littrow_handbook_example_from_memory():
    # From memory (textbook example, e.g. grating handbooks' first-order Littrow case):
    # a 1200 g/mm grating at 500 nm in Littrow works at about 17.46 deg.
    assert gr.littrow_angle_deg(5000.0, groove_density_per_mm=1200) == pytest.approx(17.46, abs=0.005)


def _model(tilt=8.93, **kw):
    base = dict(groove_density_per_mm=600, order=1, camera_collimator_angle_deg=30.0,
                tilt_deg=tilt, focal_length_mm=250.0, pixel_size_um=15.0, binning=2,
                center_px=511.5)
    base.update(kw)
    return gr.GratingModel(**base)


@pytest.mark.parametrize("tilt", [-5.0, 8.93, 11.83, 25.0])
@pytest.mark.parametrize("order", [1, 2])
def test_forward_inverse_round_trip(tilt, order):
    g = _model(tilt, order=order)
    x = np.linspace(-10, 1034, 300)
    assert_allclose(g.pixel(g.wavelength(x)), x, atol=1e-8)


def test_forward_model_satisfies_grating_equation():
    # Analytic truth: m lambda = d (sin alpha + sin beta) with the contract geometry
    g = _model(11.83, focal_length_mm=252.0, center_px=500.0)
    x = np.array([0.0, 250.0, 500.0, 1023.0])
    beta = math.radians(11.83 - 15.0) + np.arctan((x - 500.0) * 0.030 / 252.0)
    lam = (1e7 / 600) * (math.sin(math.radians(26.83)) + np.sin(beta))
    assert_allclose(g.wavelength(x), lam, rtol=1e-14)


def test_dispersion_matches_numerical_derivative():
    g = _model(11.83)
    x = np.linspace(0, 1023, 50)
    h = 1e-3
    numeric = (g.wavelength(x + h) - g.wavelength(x - h)) / (2 * h)
    assert_allclose(g.dispersion(x), numeric, rtol=1e-8)
    # on the camera axis it is the handbook reciprocal linear dispersion d cos(beta)/(m f)
    axis = gr.reciprocal_linear_dispersion(g.beta_center_deg, groove_density_per_mm=600,
                                           focal_length_mm=250.0) * g.pixel_mm
    assert g.dispersion(511.5) == pytest.approx(axis, rel=1e-12)


def test_anamorphic_factor_matches_numerical_beam_magnification():
    # Truth: |d beta / d alpha| at fixed wavelength from the grating equation, numerically
    g = _model(8.93)
    for x in (0.0, 511.5, 1023.0):
        lam = float(g.wavelength(x))
        h = 1e-5
        b_plus = gr.diffraction_angle_deg(lam, g.alpha_deg + h, groove_density_per_mm=600)
        b_minus = gr.diffraction_angle_deg(lam, g.alpha_deg - h, groove_density_per_mm=600)
        assert abs((b_plus - b_minus) / (2 * h)) == pytest.approx(float(g.anamorphic_factor(x)),
                                                                  rel=1e-7)


def test_slit_resolving_power_from_independent_ray_trace():
    # Truth: displace the slit by its width (angle in the collimated beam = width * p / f_cam,
    # because the spatial scale maps 1 unbinned px on the detector to `scale` arcsec), trace
    # the ray through the grating equation, and convert the shift back to wavelength.
    g = _model(8.93)
    scale, slit = 0.2, 1.2
    lam = float(g.wavelength(511.5))
    dalpha = math.degrees((slit / scale) * 0.015 / 250.0)
    b0 = gr.diffraction_angle_deg(lam, g.alpha_deg, groove_density_per_mm=600)
    b1 = gr.diffraction_angle_deg(lam, g.alpha_deg + dalpha, groove_density_per_mm=600)
    width_px = abs(math.radians(b1 - b0)) * 250.0 / 0.030
    assert g.slit_width_px(511.5, slit_width_arcsec=slit,
                           spatial_scale_arcsec_per_px=scale) == pytest.approx(width_px, rel=1e-4)
    r = lam / (width_px * float(g.dispersion(511.5)))
    assert float(g.resolving_power(511.5, slit_width_arcsec=slit,
                                   spatial_scale_arcsec_per_px=scale)) == pytest.approx(r, rel=1e-4)


def test_model_from_config_centre_and_binning():
    g = gr.model_from_config(RLS, tilt_deg=8.93, binning=2, nx_px=1024)
    assert g.center_px == 511.5
    # unbinned pixel 1023.5 (between unbinned 1023 and 1024) is binned 511.25
    g2 = gr.model_from_config(dict(RLS, detector_center_px=1023.0), tilt_deg=8.93, binning=2)
    assert g2.center_px == pytest.approx(511.25)
    # binned and unbinned models agree on the wavelength of the same physical place
    g1 = gr.model_from_config(RLS, tilt_deg=8.93, binning=1, nx_px=2048)
    assert float(g1.wavelength(2 * 100 + 0.5)) == pytest.approx(float(g.wavelength(100)), abs=1e-9)
    with pytest.raises(ConfigError, match="camera_focal_length_mm"):
        gr.model_from_config({k: v for k, v in RLS.items() if k != "camera_focal_length_mm"},
                             tilt_deg=8.9, nx_px=10)


def test_bad_arguments_name_the_argument():
    with pytest.raises(ValueError, match="focal_length_mm"):
        _model(focal_length_mm=-1)
    with pytest.raises(ValueError, match="binning"):
        _model(binning=0)
    with pytest.raises(ValueError, match="groove_density_per_mm"):
        gr.groove_spacing_angstrom("lots")
    assert math.isnan(float(_model().pixel(1e6)))  # beyond sin(beta) = 1: no such ray


def test_order_overlap_second_order_lands_where_the_grating_equation_says():
    g = gr.model_from_config(RLS, tilt_deg=11.83, binning=2, nx_px=1024)  # demo setup B
    with pytest.warns(OrderOverlapWarning, match="order 2"):
        s = gr.summarize_setup(g, 1024, filter_name="NONE", cut_on_angstrom=None)
    (o,) = [o for o in s.overlaps if o.order == 2]
    assert not o.blocked
    # truth: the second-order model puts lambda_2 exactly where the first order has 2 lambda_2
    g2 = g.with_changes(order=2)
    assert float(g2.pixel(o.wave_range_angstrom[0])) == pytest.approx(o.x_range_px[0], abs=0.3)
    assert o.wave_range_angstrom[0] == pytest.approx(gr.DEFAULT_BLUE_LIMIT_ANGSTROM, abs=2.0)
    # the GG495 filter (cut-on 4950 A) blocks it: no warning
    with warnings.catch_warnings():
        warnings.simplefilter("error", OrderOverlapWarning)
        s = gr.summarize_setup(g, 1024, filter_name="GG495", cut_on_angstrom=4950.0)
    assert all(o.blocked for o in s.overlaps) and s.overlaps


def test_no_overlap_for_blue_setup():
    # demo setup A: coverage ~3985-6018 A; order 2 light would be 1992-3009 A, below 3200 A
    g = gr.model_from_config(RLS, tilt_deg=8.93, binning=2, nx_px=1024)
    with warnings.catch_warnings():
        warnings.simplefilter("error", OrderOverlapWarning)
        s = gr.summarize_setup(g, 1024, filter_name="NONE")
    assert s.overlaps == ()
    lo, hi = s.coverage_angstrom
    assert lo == pytest.approx(float(g.wavelength(-0.5))) and hi == pytest.approx(float(g.wavelength(1023.5)))


def test_second_order_setup_warns_about_first_order_red_light():
    # working in order 2, first-order light of 2x the wavelength reaches the same pixels;
    # a long-pass filter cannot block it
    g = gr.model_from_config(dict(RLS, order=2), tilt_deg=11.83, binning=2, nx_px=1024)
    with pytest.warns(OrderOverlapWarning, match="order 1 light"):
        s = gr.summarize_setup(g, 1024, filter_name="GG495", cut_on_angstrom=4950.0)
    assert any(o.order == 1 and not o.blocked for o in s.overlaps)


@pytest.mark.parametrize("reference_px", [None, 120.0])
@pytest.mark.parametrize("tilt", [8.93, 11.83])
def test_wcs_grating_cards_evaluated_by_astropy(reference_px, tilt):
    g = _model(tilt, focal_length_mm=247.3, center_px=515.2)
    header = fits.Header()
    for key, value, comment in gr.grating_wcs_cards(g, reference_px=reference_px):
        header[key] = (value, comment)
    x = np.arange(1024.0)
    # astropy.wcs (WCSLIB) is the independent evaluator: AWAV-GRA is the grating equation
    # on air wavelengths (Greisen et al. 2006), the same physics as the model
    assert header["CTYPE1"] == "AWAV-GRA"
    wave = WCS(header).all_pix2world(x, 0)[0] * 1e10  # metres -> Angstrom
    assert_allclose(wave, g.wavelength(x), atol=1e-8)
    # read as the vacuum variant (GRI) the same cards differ by milli-Angstroms: the
    # algorithm code matters (WCSLIB converts vacuum to air across the detector)
    header["CTYPE1"] = "AWAV-GRI"
    wave_gri = WCS(header).all_pix2world(x, 0)[0] * 1e10
    assert np.abs(wave_gri - g.wavelength(x)).max() > 1e-3


def test_command_line_prints_the_setup(tmp_path, capsys):
    import yaml
    cfg = tmp_path / "inst.yaml"
    cfg.write_text(yaml.safe_dump({"instrument": {"spatial_scale_arcsec_per_px": 0.2,
                                                  "grating": dict(RLS, detector_pixels_dispersion=2048)}}))
    assert gr.main(["--config", str(cfg), "--tilt", "11.83", "--binning", "2", "--slit", "1.2"]) == 0
    text = capsys.readouterr().out
    g = gr.model_from_config(RLS, tilt_deg=11.83, binning=2, nx_px=1024)
    lo, hi = g.coverage(1024)
    assert f"{lo:9.1f} - {hi:9.1f} A" in text
    assert "R = mN 36000" in text  # 600/mm x 60 mm x order 1
    assert "WARNING: not blocked" in text
    gr.main(["--config", str(cfg), "--tilt", "11.83", "--binning", "2", "--filter", "GG495"])
    assert "blocked by the filter" in capsys.readouterr().out
    with pytest.raises(SystemExit):
        gr.main(["--config", str(tmp_path / "missing.yaml"), "--tilt", "8"])
    assert "missing.yaml" in capsys.readouterr().err


def test_command_line_on_the_project_config(capsys):
    # the shipped config must be enough for the observer's check
    assert gr.main(["--config", str(REPO / "config" / "instruments" / "rls.yaml"), "--tilt", "8.93",
                    "--binning", "2"]) == 0
    assert "coverage" in capsys.readouterr().out
