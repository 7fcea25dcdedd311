"""Hostile and damaged configuration files: each one ends in one ConfigError (exit 78)
that says where and what, never a traceback, a silent choice or gigabytes of work; and
``check-config`` looks at the store path and the serial ports on this machine."""

from __future__ import annotations

from pathlib import Path

import pytest
import yaml

from daemon.commands.cli import main
from daemon.config.settings import (
    EX_CONFIG,
    MAX_DEPTH,
    MAX_FILE_BYTES,
    MAX_WHOLE,
    ConfigError,
    load_config,
)

CONFIG_DIR = Path(__file__).resolve().parent.parent / "config"
PICO = (CONFIG_DIR / "pico-sereno.yaml").read_text()


def _write(tmp_path: Path, text: str, name: str = "hostile.yaml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def _line_of(text: str, needle: str, nth: int = 1) -> int:
    """1-based line number of the nth line that starts with ``needle`` (after indent)."""
    hits = [i + 1 for i, line in enumerate(text.splitlines()) if line.strip().startswith(needle)]
    return hits[nth - 1]


# --------------------------------------------------------------------------- duplicates
# YAML spec, "Nodes" (1.2.2 section 3.2.1.1; the number from memory): "The content of a
# mapping node is an unordered set of key/value node pairs, with the restriction that
# each of the keys is unique." PyYAML's SafeLoader keeps the last one silently.

def test_duplicate_nested_key_names_the_key_and_both_lines(tmp_path):
    text = PICO.replace("  latitude_deg: 19.95\n",
                        "  latitude_deg: 19.95\n  latitude_deg: -19.95\n", 1)
    first, second = _line_of(text, "latitude_deg:"), _line_of(text, "latitude_deg:", 2)
    assert second == first + 1
    with pytest.raises(ConfigError) as info:
        load_config(_write(tmp_path, text))
    assert str(info.value) == (
        f"{tmp_path / 'hostile.yaml'}: line {second}, column 3: site.latitude_deg: key given "
        f"twice, at line {first} and line {second}; keep one")


def test_duplicate_top_level_section(tmp_path):
    text = PICO + "\nsite:\n  name: Somewhere else\n"
    first, second = _line_of(text, "site:"), _line_of(text, "site:", 2)
    with pytest.raises(ConfigError, match=rf"site: key given twice, at line {first} and line "
                                          rf"{second}; keep one"):
        load_config(_write(tmp_path, text))


def test_duplicate_key_inside_a_list_item_names_the_item(tmp_path):
    text = PICO.replace('{name: "380",  wavelength_nm: 380,',
                        '{name: "380", wavelength_nm: 380, wavelength_nm: 390,', 1)
    assert text != PICO
    with pytest.raises(ConfigError,
                       match=r"instrument\.channels\[0\]\.wavelength_nm: key given twice"):
        load_config(_write(tmp_path, text))


# --------------------------------------------------------------------------- size

def test_file_over_the_size_limit_says_its_size_and_the_limit(tmp_path):
    pad = MAX_FILE_BYTES + 1 - len(PICO.encode()) - 1
    path = _write(tmp_path, PICO + "#" + "x" * (pad - 1) + "\n")
    assert path.stat().st_size == MAX_FILE_BYTES + 1
    with pytest.raises(ConfigError, match=rf"the file is {MAX_FILE_BYTES + 1} bytes; a "
                                          rf"configuration may be at most {MAX_FILE_BYTES} "
                                          r"bytes \(1 MiB\)"):
        load_config(path)


def test_file_at_the_size_limit_still_loads(tmp_path):
    pad = MAX_FILE_BYTES - len(PICO.encode()) - 1
    path = _write(tmp_path, PICO + "#" + "x" * (pad - 1) + "\n")
    assert path.stat().st_size == MAX_FILE_BYTES
    assert load_config(path).site.name == "Pico Sereno Station"


# --------------------------------------------------------------------------- nesting

def test_nesting_deeper_than_the_limit(tmp_path):
    # The top-level mapping is the first level, so MAX_DEPTH brackets make one too many.
    text = PICO + "extra: " + "[" * MAX_DEPTH + "]" * MAX_DEPTH + "\n"
    line = _line_of(text, "extra:")
    with pytest.raises(ConfigError, match=rf"line {line}, column {8 + MAX_DEPTH - 1}: nested "
                                          rf"more than {MAX_DEPTH} levels deep"):
        load_config(_write(tmp_path, text))


def test_nesting_at_the_limit_passes_the_yaml_stage(tmp_path):
    depth = MAX_DEPTH - 1
    text = PICO + "extra: " + "[" * depth + "]" * depth + "\n"
    # The YAML is read; the one complaint left is the key itself.
    with pytest.raises(ConfigError, match=r": extra: unknown key; allowed keys here"):
        load_config(_write(tmp_path, text))


def test_twenty_thousand_brackets_are_a_config_error_not_a_recursion_error(tmp_path):
    text = "site: " + "[" * 20000 + "]" * 20000 + "\n"
    with pytest.raises(ConfigError, match=rf"line 1, column {6 + MAX_DEPTH}: nested more "
                                          rf"than {MAX_DEPTH} levels deep"):
        load_config(_write(tmp_path, text))


def test_twenty_thousand_brackets_exit_78(tmp_path, capsys):
    path = _write(tmp_path, "[" * 20000 + "\n")
    assert main(["check-config", str(path)]) == EX_CONFIG
    assert "nested more than" in capsys.readouterr().err


# --------------------------------------------------------------------------- aliases
# The "billion laughs" shape (from memory; common practice, no source): nine levels of
# nine aliases each, 9**9 leaves once expanded.
BOMB = "lol0: &a0 [lol, lol, lol, lol, lol, lol, lol, lol, lol]\n" + "".join(
    f"lol{i}: &a{i} [" + ", ".join([f"*a{i - 1}"] * 9) + "]\n" for i in range(1, 9))


def test_alias_bomb_is_refused_after_a_handful_of_nodes(tmp_path, monkeypatch):
    composed = 0
    real = yaml.composer.Composer.compose_node

    def counting(self, parent, index):
        nonlocal composed
        composed += 1
        # Without a bound this test must fail, not eat the machine's memory.
        assert composed < 1000, "the bomb was composed instead of refused"
        return real(self, parent, index)

    monkeypatch.setattr(yaml.composer.Composer, "compose_node", counting)
    with pytest.raises(ConfigError, match=r"line 1, column 7: anchor &a0 is not allowed; "
                                          r"write the value out in full"):
        load_config(_write(tmp_path, BOMB))
    assert composed <= 3  # the top mapping and the key "lol0"; the anchored list is not


def test_an_alias_alone_is_refused(tmp_path):
    text = PICO.replace("  ozone_du: 260 ", "  ozone_du: *x ", 1)
    assert text != PICO
    with pytest.raises(ConfigError, match=r"alias \*x is not allowed"):
        load_config(_write(tmp_path, text))


def test_merge_key_is_refused(tmp_path):
    text = PICO.replace("plan:\n", "plan:\n  <<: {airmass_min: 3.0}\n", 1)
    assert text != PICO
    with pytest.raises(ConfigError, match=r"merge key << is not allowed"):
        load_config(_write(tmp_path, text))


# --------------------------------------------------------------------------- numbers

def test_four_hundred_digit_integer_names_the_key(tmp_path):
    text = PICO.replace("  elevation_m: 3650\n", f"  elevation_m: {'9' * 400}\n", 1)
    line = _line_of(text, "elevation_m:")
    with pytest.raises(ConfigError, match=rf"line {line}, column 16: site\.elevation_m: whole "
                                          r"number '999999999999'\.\.\. \(400 digits\) is too "
                                          rf"large; allowed -{MAX_WHOLE} to {MAX_WHOLE}"):
        load_config(_write(tmp_path, text))


def test_integer_past_pythons_digit_limit_is_refused_before_conversion(tmp_path):
    # Python 3.11+ refuses int() of more than 4300 decimal digits with ValueError
    # (docs.python.org, "Integer string conversion length limitation").
    text = PICO.replace("  burst_samples: 10", f"  burst_samples: {'1' * 5000}", 1)
    assert text != PICO
    with pytest.raises(ConfigError, match=r"acquisition\.burst_samples: whole number .*"
                                          r"\(5000 digits\) is too large"):
        load_config(_write(tmp_path, text))


@pytest.mark.parametrize("value, message", [
    # 2**53 itself is read, then the key's own range refuses it.
    (str(MAX_WHOLE), r"site\.elevation_m: 9007199254740992 is out of range; allowed -450"),
    (str(MAX_WHOLE + 1), r"site\.elevation_m: whole number '9007199254740993' is too large"),
    ("0x" + "f" * 20, r"site\.elevation_m: whole number '0xffffffffffffffffffff' is too large"),
])
def test_whole_number_bound(tmp_path, value, message):
    text = PICO.replace("  elevation_m: 3650\n", f"  elevation_m: {value}\n", 1)
    with pytest.raises(ConfigError, match=message):
        load_config(_write(tmp_path, text))


def test_four_hundred_digit_integer_exits_78(tmp_path, capsys):
    text = PICO.replace("  latitude_deg: 19.95\n", f"  latitude_deg: {'1' * 400}\n", 1)
    assert main(["check-config", str(_write(tmp_path, text))]) == EX_CONFIG
    assert "site.latitude_deg: whole number" in capsys.readouterr().err


# --------------------------------------------------------------------------- parse errors

@pytest.mark.parametrize("old, new, starts, message", [
    # A tab may not indent YAML (YAML 1.2.2, section 6.1; from memory).
    ("  ozone_du: 260", "\tozone_du: 260", "ozone_du:",
     r"column 1: found character '\\t' that cannot start any token"),
    # C0 control characters other than tab, LF and CR are outside YAML's printable set
    # (YAML 1.2.2, section 5.1; from memory); PyYAML reports an offset, not a line.
    ("name: Pico Sereno Station", "name: Pico\x07Sereno Station", "name: Pico",
     r"column 13: control character U\+0007 is not allowed"),
])
def test_parse_error_gives_line_and_column(tmp_path, old, new, starts, message):
    text = PICO.replace(old, new, 1)
    line = _line_of(text, starts)
    with pytest.raises(ConfigError, match=rf"not valid YAML at line {line}, {message}"):
        load_config(_write(tmp_path, text))


def test_impossible_date_is_a_config_error(tmp_path):
    text = PICO + "extra: 2027-02-30\n"
    with pytest.raises(ConfigError, match=r"extra: '2027-02-30' is not a date"):
        load_config(_write(tmp_path, text))


# --------------------------------------------------------------------------- check-config

def _config(tmp_path: Path, store: str, radiometer: str = "socket://127.0.0.1:7001",
            tracker: str = "loop://") -> Path:
    data = yaml.safe_load(PICO)
    data["store"]["path"] = store
    data["instrument"]["radiometer"]["port"] = radiometer
    data["instrument"]["tracker"]["port"] = tracker
    return _write(tmp_path, yaml.safe_dump(data), "station.yaml")


def test_check_config_refuses_a_store_path_that_is_a_directory(tmp_path, capsys):
    path = _config(tmp_path, str(tmp_path))
    assert main(["check-config", str(path)]) == EX_CONFIG
    assert capsys.readouterr().err.strip() == (
        f"heliotrope check-config: {path}: store.path: {tmp_path} is a directory; give the "
        f"path of the store file in it, for example {tmp_path / 'heliotrope.db'}")


@pytest.mark.parametrize("below", ["x.db", "sub/x.db"])
def test_check_config_refuses_a_file_where_the_directory_should_be(tmp_path, capsys, below):
    (tmp_path / "plain").write_text("not a directory\n")
    path = _config(tmp_path, str(tmp_path / "plain" / below))
    assert main(["check-config", str(path)]) == EX_CONFIG
    err = capsys.readouterr().err
    assert f"store.path: {tmp_path / 'plain'} is not a directory" in err


def test_check_config_warns_about_a_missing_store_directory(tmp_path, capsys):
    missing = tmp_path / "state" / "heliotrope"
    path = _config(tmp_path, str(missing / "heliotrope.db"))
    assert main(["check-config", str(path)]) == 0
    out, err = capsys.readouterr()
    assert err.splitlines() == [
        f"WARNING store.path: directory {missing} does not exist on this machine yet; the "
        f"service creates it at start, which needs write access to {tmp_path}"]
    assert ": ok - Pico Sereno Station" in out


def test_check_config_quiet_for_an_existing_store_directory_and_url_ports(tmp_path, capsys):
    path = _config(tmp_path, str(tmp_path / "heliotrope.db"))
    assert main(["check-config", str(path)]) == 0
    out, err = capsys.readouterr()
    assert err == ""  # socket:// and loop:// name no device file to look for
    assert "port" not in out


def test_check_config_says_which_serial_ports_exist(tmp_path, capsys):
    present = tmp_path / "ttyUSB7"  # a stand-in device node: only its existence is checked
    present.write_text("")
    absent = tmp_path / "ttyUSB8"
    path = _config(tmp_path, str(tmp_path / "heliotrope.db"), radiometer=str(absent),
                   tracker=str(present))
    assert main(["check-config", str(path)]) == 0  # a warning, not a failure
    out, err = capsys.readouterr()
    assert err.splitlines() == [
        f"WARNING instrument.radiometer.port: {absent} does not exist on this machine; fine "
        "on a bench, but on the station check the cable and `ls -l /dev/serial/by-id/`"]
    assert f"instrument.tracker.port: {present} exists on this machine" in out
