"""Flexure from night-sky lines (pipeline/extraction/flexure.py, pipeline/extraction/skylines.py).

Truth used here:
* demo-simulator truth (independent code): the flexure shift of each frame
  (binned pixels along the dispersion) and the exact wavelength map with and
  without it;
* the published line list tests/reference/sky_lines_air.csv (sources ASDq =
  NIST ASD values quoted in several files, HBc = NIST Handbook copy; rows
  marked ``memory`` are not used as truth).
"""

import csv
import warnings

import numpy as np
import pytest

from pipeline.core.errors import FlexureWarning
from pipeline.extraction.flexure import C_KMS, apply_flexure, measure_flexure
from pipeline.extraction.skylines import DEFAULT_SKY_LINES, group_blends, load_sky_lines
from pipeline.extraction.detect import object_mask


def _reference_rows(reference_dir):
    with open(reference_dir / "sky_lines_air.csv", newline="") as fh:
        return list(csv.DictReader(line for line in fh if not line.startswith("#")))


def test_shipped_list_is_the_reference_table(reference_dir):
    rows = _reference_rows(reference_dir)
    shipped = load_sky_lines(DEFAULT_SKY_LINES, verified_only=False)
    ref = sorted((float(r["wavelength_air_angstrom"]), r["species"], r["source"]) for r in rows)
    got = sorted(zip(np.asarray(shipped["wavelength_air_angstrom"], float),
                     [str(s) for s in shipped["species"]], [str(s) for s in shipped["source"]]))
    assert len(got) == len(ref) == 31
    for (w1, s1, k1), (w2, s2, k2) in zip(ref, got):
        assert w1 == pytest.approx(w2, abs=1e-6) and s1 == s2 and k1 == k2


def test_default_lines_are_only_verified_ones(reference_dir):
    lines = load_sky_lines()
    assert "memory" not in set(str(s) for s in lines["source"])
    # the verified rows of the reference table: [O I] 5577/6300/6364, Na D, Hg I, Na 5683/5688
    verified = {float(r["wavelength_air_angstrom"]) for r in _reference_rows(reference_dir)
                if r["source"] != "memory"}
    assert set(np.round(np.asarray(lines["wavelength_air_angstrom"], float), 4)) == \
        {round(w, 4) for w in verified}
    assert {5577.339, 6300.304, 6363.776, 5889.95, 5895.92} <= verified


@pytest.fixture(scope="module")
def flexed_frame():
    from test_sky import simulated_frame
    return simulated_frame("TRV-9", exptime_s=900.0, seed=51, flexure_x_px=0.35)


def _measure(f, **kwargs):
    lines = load_sky_lines()
    sky_pixels, _ = object_mask(f["data"], f["variance"], f["mask"], f["wave0"],
                                fwhm_guess_px=3.0)
    return measure_flexure(f["data"], f["variance"], f["mask"], f["wave0"], sky_pixels,
                           lines["wavelength_air_angstrom"], line_species=lines["species"],
                           **kwargs)


def test_flexure_shift_matches_simulator_truth(flexed_frame):
    f = flexed_frame
    res = _measure(f)
    truth = f["truth"].flexure_x_px  # binned px, + = towards longer x (demo_data/README.md)
    assert truth == pytest.approx(0.35)
    assert res.status == "ok" and res.info["n_used"] >= 4
    assert res.shift_px == pytest.approx(truth, abs=0.02)
    assert abs(res.shift_px - truth) < 4 * res.shift_err_px + 0.005
    # only verified lines were fitted; [O I] 5577 and Na D are among them
    used = res.lines[res.lines["used"]]
    assert any(abs(w - 5577.339) < 0.01 for w in used["wavelength_ref_angstrom"])
    assert any(abs(w - 5889.95) < 0.01 for w in used["wavelength_ref_angstrom"])
    # velocity: c * shift * dispersion / wavelength at the lines used
    disp = np.median(np.diff(f["wave0"][128]))
    lam = np.mean(used["wavelength_ref_angstrom"])
    assert res.shift_kms == pytest.approx(C_KMS * res.shift_px * disp / lam, rel=0.05)


def test_corrected_map_matches_the_flexed_truth(flexed_frame):
    f = flexed_frame
    res = _measure(f)
    corrected = apply_flexure(f["wave0"], res.shift_px)
    truth_map = f["truth"].wavelength_map()  # includes the frame's flexure
    before = np.max(np.abs(f["wave0"] - truth_map))
    after = np.max(np.abs(corrected - truth_map))
    assert before > 0.5  # 0.35 px x 1.97 A/px
    assert after < 0.05  # 0.02 px


def test_large_shift_warns(flexed_frame):
    with pytest.warns(FlexureWarning, match="exceeds the limit"):
        res = _measure(flexed_frame, warn_shift_px=0.2)
    assert res.status == "ok"


def test_no_line_in_coverage_warns_and_keeps_the_arc():
    ny, nx = 40, 300
    wave = np.tile(np.linspace(7000.0, 7400.0, nx), (ny, 1))  # no verified line here
    data = np.full((ny, nx), 50.0)
    lines = load_sky_lines()
    with pytest.warns(FlexureWarning, match="no night-sky line"):
        res = measure_flexure(data, data, np.zeros(data.shape, np.uint8), wave,
                              np.ones(data.shape, bool), lines["wavelength_air_angstrom"])
    assert res.status == "no_lines" and res.shift_px == 0.0
    np.testing.assert_array_equal(apply_flexure(wave, res.shift_px), wave)


def test_apply_flexure_is_a_shift_along_rows():
    wave = 5000.0 + 2.0 * np.arange(10.0)[None, :] + 0.1 * np.arange(3.0)[:, None]
    out = apply_flexure(wave, 0.25)
    np.testing.assert_allclose(out, wave - 0.5)  # linear map: exact
    assert not np.shares_memory(out, wave)


def test_blends_are_grouped():
    groups = group_blends([5577.339, 5889.95, 5895.92, 6300.304], min_separation_angstrom=12.0)
    assert [g.tolist() for g in groups] == [[0], [1, 2], [3]]
