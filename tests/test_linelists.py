"""The shipped arc line list against the published reference table.

Truth: ``arc_lines_air.csv`` in tests/reference (a copy of ../shared/reference,
NIST-derived values with a source key per row; rows with source ``memory`` are not truth).
"""

import csv
from pathlib import Path

import numpy as np
import pytest

from pipeline.core.errors import ConfigError, InputFileError
from pipeline.wavelength.linelists import (DEFAULT_LINE_LIST, parse_lamps, read_line_list,
                                species_for_lamps)

REPO = Path(__file__).resolve().parents[1]
LAMPS = {"HgAr": ["Hg I", "Ar I"], "Ne": ["Ne I"], "He": ["He I"], "Ar": ["Ar I"]}  # config/instruments/rls.yaml


def _reference(name):
    for folder in (REPO / "tests" / "reference", REPO.parent / "shared" / "reference"):
        if (folder / name).exists():
            return folder / name
    pytest.skip(f"reference table {name} not found in tests/reference or ../shared/reference")


def _csv_rows(path):
    with open(path, newline="") as stream:
        return list(csv.DictReader(line for line in stream if not line.startswith("#")))


def test_shipped_list_equals_reference_row_by_row():
    ref = _csv_rows(_reference("arc_lines_air.csv"))
    shipped = _csv_rows(DEFAULT_LINE_LIST)
    assert len(ref) == 281  # reference README: 281 rows
    assert shipped == ref   # same wavelengths, intensities, sources and notes, same order


def test_verified_lines_are_read_with_their_wavelengths():
    ref = [r for r in _csv_rows(_reference("arc_lines_air.csv")) if "memory" not in r["source"]]
    lines = read_line_list()
    assert len(lines) == len(ref) == 281 - 9  # README: 9 arc rows from memory
    assert "memory" not in set(lines.source)
    # every verified reference wavelength is in the list with its species and source
    got = {(s, round(w, 4), src) for s, w, src in zip(lines.species, lines.wave_air_angstrom,
                                                       lines.source)}
    for r in ref:
        assert (r["species"], round(float(r["wavelength_air_angstrom"]), 4), r["source"]) in got
    assert np.all(np.diff(lines.wave_air_angstrom) >= 0)


def test_published_anchor_values():
    lines = read_line_list(species=["Hg I", "Ne I", "He I"])
    w = lines.wave_air_angstrom
    # ASDq (NIST ASD, quoted in five or more files): Hg I 5460.735, 4358.328 A
    # HBc/RPP: He I 5875.62; ASDc/HBc: Ne I 6402.248
    for value in (5460.735, 4358.328, 5875.62, 6402.248):
        assert np.min(np.abs(w - value)) < 1e-9


def test_species_selection_and_memory_rows():
    hg = read_line_list(species=["Hg I"])
    assert set(hg.species) == {"Hg I"}
    assert 6907.52 not in hg.wave_air_angstrom            # memory row dropped
    hg_all = read_line_list(species=["Hg I"], exclude_sources=())
    assert 6907.52 in hg_all.wave_air_angstrom and len(hg_all) == len(hg) + 4
    with pytest.raises(ConfigError, match="Zz I"):
        read_line_list(species=["Zz I"])


def test_rank_weight_within_species():
    ne = read_line_list(species=["Ne I"]).in_range(6900, 7100)
    weight = ne.rank_weight()
    brightest = ne.wave_air_angstrom[np.argmax(weight)]
    assert brightest == pytest.approx(6929.4672)  # ASDc intensity 100000, the largest here


def test_lamps_to_species():
    assert parse_lamps("HgAr, Ne") == ["HgAr", "Ne"] and parse_lamps("HgAr+Ne") == ["HgAr", "Ne"]
    assert species_for_lamps("HgAr,Ne", LAMPS) == ["Hg I", "Ar I", "Ne I"]
    assert species_for_lamps("ne+ar", LAMPS) == ["Ne I", "Ar I"]
    with pytest.raises(InputFileError, match=r"arc_9.fits: keyword LAMPS = 'Kr'.*Kr"):
        species_for_lamps("Kr", LAMPS, path="arc_9.fits")
    with pytest.raises(InputFileError, match="LAMPS"):
        species_for_lamps("", LAMPS)


def test_bad_file(tmp_path):
    bad = tmp_path / "lines.csv"
    bad.write_text("species,wavelength\nNe I,6402.2\n")
    with pytest.raises(InputFileError, match="lacks column"):
        read_line_list(bad)
    bad.write_text("species,wavelength_air_angstrom,relative_intensity,source,note\nNe I,abc,,x,\n")
    with pytest.raises(InputFileError, match="row 2.*'abc'"):
        read_line_list(bad)
    with pytest.raises(InputFileError, match="cannot read"):
        read_line_list(tmp_path / "none.csv")
