"""Wrong Modbus register maps are configuration errors: `heliotrope check-config` exits
78 (EX_CONFIG) with one line naming the key inside instrument.*.options."""

from __future__ import annotations

import copy
from pathlib import Path

import pytest
import yaml

from daemon.commands.cli import main
from drivers.interfaces import DriverConfigError
from drivers.modbus_map import check_radiometer_options, check_tracker_options

EX_CONFIG = 78
CONFIG = Path(__file__).resolve().parent.parent / "config" / "pico-sereno-modbus.yaml"
BASE = yaml.safe_load(CONFIG.read_text())
RAD = "instrument.radiometer.options"
TRK = "instrument.tracker.options"


def _with(path: str, value, *, delete: bool = False) -> dict:
    data = copy.deepcopy(BASE)
    *parents, last = path.split(".")
    node = data
    for p in parents:
        node = node[p]
    if delete:
        del node[last]
    else:
        node[last] = value
    return data


# (key to change, new value or DELETE, the key the message must name, words it must say)
DELETE = object()
WRONG = [
    # Overlapping registers: the int32 at 0 takes 0 and 1, so a channel at 1 overlaps.
    (f"{RAD}.channels.registers", [0, 1, 4, 6, 8, 10], f"{RAD}.channels.registers[1]",
     "input register 1 is also used by"),
    # Housekeeping on a channel's register.
    (f"{RAD}.housekeeping.case_temp_c", {"register": 4, "data_type": "int16"},
     f"{RAD}.housekeeping.case_temp_c.register", "also used by"),
    # A data type that does not fit the count: int32 takes two registers (V1.1b3 sec. 4.2:
    # registers are 16 bits, so 32 bits need two).
    (f"{RAD}.channels.count", 1, f"{RAD}.channels.count", "do not fit data type int32"),
    (f"{RAD}.channels.data_type", "int24", f"{RAD}.channels.data_type",
     "must be one of int16, uint16, int32, uint32, float32"),
    (f"{RAD}.channels.word_order", "middle", f"{RAD}.channels.word_order",
     "must be one of big, little"),
    # Missing required register.
    (f"{RAD}.channels.registers", DELETE, f"{RAD}.channels.registers", "missing"),
    (f"{TRK}.setpoint.elevation", DELETE, f"{TRK}.setpoint.elevation", "missing"),
    (f"{TRK}.status.bits.locked", DELETE, f"{TRK}.status.bits.locked", "missing"),
    # Unit ids 1-247 (Modbus over Serial Line V1.02 sec. 2.2: 0 broadcast, 248-255
    # reserved).
    (f"{RAD}.unit_id", 0, f"{RAD}.unit_id", "from 1 to 247"),
    (f"{TRK}.unit_id", 248, f"{TRK}.unit_id", "from 1 to 247"),
    # Addresses are 16 bits (V1.1b3 sec. 4.4): an int32 at 65535 runs past the end.
    (f"{RAD}.channels.registers", [0, 2, 4, 6, 8, 65535], f"{RAD}.channels.registers[5]",
     "runs past the last address 65535"),
    (f"{RAD}.channels.full_scale_raw", 1e12, f"{RAD}.channels.full_scale_raw",
     "beyond what int32 holds"),
    (f"{RAD}.link", "ascii", f"{RAD}.link", "must be one of rtu, tcp"),
    (f"{RAD}.burst_interval", 0.1, f"{RAD}.burst_interval", "unknown key"),
    (f"{TRK}.commands.park", {"coil": 1}, f"{TRK}.commands.park", "coil register 1 is also"),
    (f"{TRK}.status.data_type", "float32", f"{TRK}.status.data_type",
     "status bits need uint16 or uint32"),
    (f"{TRK}.status.bits.fault", 16, f"{TRK}.status.bits.fault", "from 0 to 15"),
    (f"{RAD}.channels.function", "coil", f"{RAD}.channels.function",
     "must be one of input, holding"),
    (f"{TRK}.setpoint.function", "input", f"{TRK}.setpoint.function",
     "must be one of holding"),
]


def _case_id(path: str, value: object) -> str:
    """A stable test id (the same in every process, as pytest-xdist needs)."""
    return (f"{path}=deleted" if value is DELETE else f"{path}={value!r}")[-60:]


@pytest.mark.parametrize("path,value,key,words", WRONG,
                         ids=[_case_id(w[0], w[1]) for w in WRONG])
def test_check_config_names_the_key(tmp_path, capsys, path, value, key, words):
    data = _with(path, None, delete=True) if value is DELETE else _with(path, value)
    bad = tmp_path / "bad.yaml"
    bad.write_text(yaml.safe_dump(data))
    assert main(["check-config", str(bad)]) == EX_CONFIG
    err = capsys.readouterr().err.strip()
    assert f"{bad}: {key}: " in err, err
    if words:
        assert words in err, err


def test_the_clock_over_a_holding_register_of_the_map_is_refused(tmp_path):
    # The clock takes three holding registers; put the tracker's clock on its setpoint.
    options = copy.deepcopy(BASE["instrument"]["tracker"]["options"])
    options["clock"] = {"register": 2}
    with pytest.raises(DriverConfigError) as err:
        check_tracker_options(options)
    assert err.value.key == "clock.register"
    assert "holding register 2 is also used by setpoint.elevation" in err.value.message


def test_the_shipped_maps_parse_to_what_the_file_says():
    r = check_radiometer_options(BASE["instrument"]["radiometer"]["options"])
    assert [v.address for v in r.channels] == [0, 2, 4, 6, 8, 10]
    assert {v.data_type for v in r.channels} == {"int32"} and r.channels[0].count == 2
    assert r.link.unit_id == 1 and (r.link.parity, r.link.stopbits) == ("N", 2)
    assert r.shutter_coil == 0 and r.clock_register == 100
    assert dict(r.housekeeping)["pressure_hpa"].to_value(35000) == pytest.approx(650.0)
    t = check_tracker_options(BASE["instrument"]["tracker"]["options"])
    assert t.bit("locked") == 4 and t.goto is not None and t.goto.coil == 0
    assert t.setpoint_azimuth.to_raw(123.4567) == 1234567


def test_a_modbus_driver_without_options_says_where_the_map_goes():
    with pytest.raises(DriverConfigError, match="needs an options block"):
        check_radiometer_options(None)
