"""Channel filter functions: the file format, the configuration keys, band integrals."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import yaml

from daemon.commands.cli import main
from daemon.config.filterfile import FilterSpec, gaussian_spec, read_filter_spec
from daemon.config.settings import EX_CONFIG, Channel, ConfigError, load_config
from daemon.science.filters import astm_filter_mean_w_m2_nm, sampled_response, solar_weights
from daemon.science.lamp import lamp_check
from drivers.filtertable import FilterFileError, read_filter_table
from sim_instrument import filters as simfilters
from sim_instrument.scenario import ScenarioError, load_scenario

ROOT = Path(__file__).resolve().parent.parent


def _box(tmp_path: Path, centre: float, name: str = "box.csv") -> Path:
    """A 10 nm flat-topped filter: three rows, response 1 from centre-5 to centre+5 nm."""
    p = tmp_path / name
    p.write_text(f"wavelength_nm,relative_response\n{centre - 5},1\n{centre},1\n"
                 f"{centre + 5},1\n", encoding="utf-8")
    return p


@pytest.mark.parametrize("centre, box_mean", [
    # ASTM G173-03 extraterrestrial column, 10-nm box means (docs/REFERENCES.md, F).
    (380, 1.0873), (440, 1.8263), (500, 1.9191), (870, 0.9497), (1020, 0.7034),
])
def test_a_box_filter_file_gives_the_astm_box_mean(tmp_path, centre, box_mean):
    path = _box(tmp_path, centre)
    wl, resp = read_filter_table(path)
    spec = FilterSpec("file", True, str(path), wavelength_nm=wl, response=resp)
    assert astm_filter_mean_w_m2_nm(spec) == pytest.approx(box_mean, abs=6e-4)
    # the simulator's own integration over the same file agrees
    sim = simfilters.band_extraterrestrial_w_m2_nm(simfilters.load_filter_csv(path))
    assert sim == pytest.approx(box_mean, abs=6e-4)


def test_gaussian_has_its_fwhm_and_area():
    # A Gaussian is half its peak at centre +/- FWHM/2 and has the area
    # FWHM sqrt(pi / (4 ln 2)) (definition of the Gaussian; common practice, no source).
    spec = gaussian_spec(940.0, 10.0, given=True)
    wl, r = sampled_response(spec)
    assert np.interp([935.0, 945.0], wl, r) == pytest.approx([0.5, 0.5], abs=2e-3)
    trapezoid = getattr(np, "trapezoid", None) or np.trapz
    assert trapezoid(r, wl) == pytest.approx(10.0 * math.sqrt(math.pi / (4 * math.log(2))),
                                            rel=1e-4)
    sim = simfilters.gaussian(940.0, 10.0)
    assert sim.centroid_nm == pytest.approx(940.0, abs=1e-9)
    grid, w = solar_weights(spec)
    assert w.sum() == pytest.approx(1.0) and np.all(w >= 0)


def test_lamp_check_uses_the_filter_weighted_astm_mean(tmp_path):
    # With a box filter the reference is the box mean of docs/REFERENCES.md (F).
    ch = Channel("500", 500.0, 10.0, responsivity_v_per_w_m2_nm=2.0,
                 filter=read_filter_spec(_box(tmp_path, 500)))
    _, ref, ratio = lamp_check(2.0 * 1.9191, ch)
    assert ref == pytest.approx(1.9191, abs=6e-4) and ratio == pytest.approx(1.0, abs=4e-4)


@pytest.mark.parametrize("text, message", [
    ("wavelength_nm,relative_response\n500,1\n499,1\n501,1\n",
     "line 3: wavelength 499 nm is not above the previous 500 nm"),
    ("wavelength_nm,relative_response\n495,1\n500,-0.2\n505,1\n",
     "line 3: response -0.2 is negative"),
    ("wavelength_nm,relative_response\n495,1\n500,1\n", "2 rows of data; a filter needs at "
                                                        "least 3"),
    ("wl,r\n495,1\n500,1\n505,1\n", "line 1: the first line must be the header"),
    ("wavelength_nm,relative_response\n495,1\n500,x\n505,1\n", "line 3: '500,x' is not two "
                                                               "numbers"),
    ("wavelength_nm,relative_response\n495,1,2\n500,1\n505,1\n", "line 2: 3 columns"),
    ("wavelength_nm,relative_response\n495,0\n500,0\n505,0\n", "every response is 0"),
])
def test_bad_filter_files_name_the_line(tmp_path, text, message):
    p = tmp_path / "f.csv"
    p.write_text(text, encoding="utf-8")
    with pytest.raises(FilterFileError, match=message):
        read_filter_table(p)


def _config_with_filter(tmp_path: Path, filter_block: dict) -> Path:
    data = yaml.safe_load((ROOT / "config" / "pico-sereno.yaml").read_text(encoding="utf-8"))
    data["instrument"]["channels"][0]["filter"] = filter_block
    p = tmp_path / "site.yaml"
    p.write_text(yaml.safe_dump(data), encoding="utf-8")
    return p


def test_config_reads_a_filter_file_relative_to_itself(tmp_path):
    (tmp_path / "filters").mkdir()
    _box(tmp_path / "filters", 380, "f380.csv")
    cfg = load_config(_config_with_filter(tmp_path, {"file": "filters/f380.csv"}))
    spec = cfg.channels[0].filter
    assert spec.kind == "file" and spec.given and spec.wavelength_nm == (375.0, 380.0, 385.0)
    gauss = load_config(_config_with_filter(tmp_path, {"centre_nm": 381.0, "fwhm_nm": 9.0}))
    assert gauss.channels[0].filter == gaussian_spec(381.0, 9.0, given=True)
    # without filter: the Gaussian of wavelength_nm and bandwidth_nm, not "given"
    assert gauss.channels[1].filter == gaussian_spec(440.0, 10.0, given=False)


def test_a_bad_filter_file_is_a_config_error_with_key_and_line(tmp_path, capsys):
    (tmp_path / "bad.csv").write_text("wavelength_nm,relative_response\n380,1\n379,1\n390,1\n",
                                      encoding="utf-8")
    path = _config_with_filter(tmp_path, {"file": "bad.csv"})
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert "instrument.channels[0].filter.file" in str(err.value)
    assert "line 3" in str(err.value)
    with pytest.raises(ConfigError, match="instrument.channels\\[0\\].filter.fwhm_nm"):
        load_config(_config_with_filter(tmp_path, {"centre_nm": 380.0, "fwhm_nm": 0.0}))
    with pytest.raises(ConfigError, match="filter.colour: unknown key"):
        load_config(_config_with_filter(tmp_path, {"centre_nm": 380.0, "fwhm_nm": 10.0,
                                                   "colour": "blue"}))
    # the operator's check-config exits 78 (EX_CONFIG, sysexits.h) and names the key
    path = _config_with_filter(tmp_path, {"file": "bad.csv"})
    assert main(["check-config", str(path)]) == EX_CONFIG
    err = capsys.readouterr().err
    assert "instrument.channels[0].filter.file" in err and "line 3" in err


def test_scenario_filter_keys(tmp_path):
    data = yaml.safe_load((ROOT / "sim_instrument" / "scenarios" / "pico-sereno-clear.yaml")
                          .read_text(encoding="utf-8"))
    _box(tmp_path, 500, "f500.csv")
    data["instrument"]["channels"][2]["filter"] = {"file": "f500.csv"}
    data["instrument"]["channels"][3]["filter"] = {"centre_nm": 676.0, "fwhm_nm": 8.0}
    p = tmp_path / "s.yaml"
    p.write_text(yaml.safe_dump(data), encoding="utf-8")
    s = load_scenario(p)
    assert s.instrument.channels[2].filter_file == str((tmp_path / "f500.csv").resolve())
    assert s.instrument.channels[3].filter_fwhm_nm == 8.0
    (tmp_path / "f500.csv").write_text("wavelength_nm,relative_response\n495,1\n",
                                       encoding="utf-8")
    p.write_text(yaml.safe_dump(data).replace("f500.csv", "missing.csv"), encoding="utf-8")
    with pytest.raises(ScenarioError, match="instrument.channels\\[2\\].filter"):
        load_scenario(p)
