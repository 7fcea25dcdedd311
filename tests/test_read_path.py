"""The operator's read commands: no heavy imports, no writes, no waiting for the writer.

Every read command runs against a synthetic day (tests/synthetic_store.py): in a
fresh interpreter to see what it imports, in-process to check the store file is left
byte for byte as it was, and while another process holds an open write transaction.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import re
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest

from daemon.commands.cli import main
from daemon.store import reader as storeread
from tests.synthetic_store import CONFIG_PATH, DAY, build_day

ROOT = Path(__file__).resolve().parent.parent
D = DAY.isoformat()
HEAVY = ("pvlib", "pandas", "scipy", "sqlite_utils", "matplotlib")

# (argv without --db, numpy allowed, environment additions)
READ_COMMANDS = [
    (["status", "--json"], False, {}),
    (["today", "--json"], False, {}),
    (["today"], False, {}),
    (["results", "--from", D, "--to", D], False, {}),
    (["plan", "--date", D, "--json"], False, {}),
    (["export", "--from", D, "--what", "measurements", "--format", "csv"], False, {}),
    (["export", "--from", D, "--what", "samples", "--format", "json"], False, {}),
    (["export", "--from", D, "--what", "results", "--format", "csv"], False, {}),
    (["export", "--from", D, "--what", "events", "--format", "json"], False, {}),
    (["export", "--from", D, "--what", "aod", "--format", "csv"], False, {}),
    (["plot", "--date", D, "--channel", "500", "--config", str(CONFIG_PATH)], True, {}),
    (["report", "--date", D, "--config", str(CONFIG_PATH)], True, {}),
    (["ssh-gate"], False, {"SSH_ORIGINAL_COMMAND": "today --json"}),
]


def _ids(cmds):
    return [" ".join(c[0][:3]) for c in cmds]


@pytest.fixture(scope="module")
def day(tmp_path_factory):
    path = tmp_path_factory.mktemp("read") / "heliotrope.db"
    return build_day(path, heartbeat=dt.datetime.now(dt.UTC))


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


_PROBE = """
import json, sys
from daemon.commands.cli import main
import io, contextlib
out = io.StringIO()
with contextlib.redirect_stdout(out):
    rc = main(sys.argv[1:])
print(json.dumps({"rc": rc, "modules": sorted(m.split(".")[0] for m in sys.modules),
                  "out": out.getvalue()[:200]}))
"""


def _modules_loaded(day, argv, env) -> set[str]:
    """The top-level modules a fresh interpreter holds after the read command."""
    full = [*argv, "--db", str(day.path)]
    result = subprocess.run([sys.executable, "-c", _PROBE, *full], capture_output=True,
                            text=True, cwd=ROOT, env={**os.environ, **env}, timeout=60)
    assert result.returncode == 0, result.stderr
    info = json.loads(result.stdout.strip().splitlines()[-1])
    assert info["rc"] in (0, 1), (info, result.stderr)
    return set(info["modules"])


@pytest.mark.parametrize("argv,numpy_ok,env", READ_COMMANDS, ids=_ids(READ_COMMANDS))
def test_read_command_imports_nothing_heavy(day, argv, numpy_ok, env):
    loaded = _modules_loaded(day, argv, env)
    assert not loaded & set(HEAVY), sorted(loaded & set(HEAVY))
    if not numpy_ok:
        assert "numpy" not in loaded


#: The quick look-ups an operator types most, which must not make dataclasses: creating
#: one (and importing dataclasses, which imports inspect, ast and dis) costs a fresh
#: process about 1-2 ms a class on Python 3.11, tens of milliseconds on their path
#: (benchmarks/bench_read_commands.py; common practice, no source).
QUICK = [c for c in READ_COMMANDS if c[0][0] in ("status", "today", "results", "ssh-gate")]


@pytest.mark.parametrize("argv,numpy_ok,env", QUICK, ids=_ids(QUICK))
def test_quick_read_commands_make_no_dataclasses(day, argv, numpy_ok, env):
    assert "dataclasses" not in _modules_loaded(day, argv, env)


def test_read_commands_leave_the_store_file_untouched(day, capsys):
    before = _sha(day.path), day.path.stat().st_mtime_ns
    for argv, _, env in READ_COMMANDS:
        old = {k: os.environ.get(k) for k in env}
        os.environ.update(env)
        try:
            rc = main([*argv, "--db", str(day.path)])
        finally:
            for k, v in old.items():
                if v is None:
                    os.environ.pop(k, None)
                else:
                    os.environ[k] = v
        assert rc in (0, 1), argv
    capsys.readouterr()
    assert (_sha(day.path), day.path.stat().st_mtime_ns) == before


def test_the_reader_connection_refuses_writes(day):
    conn = storeread.open_readonly(day.path)
    try:
        with pytest.raises(sqlite3.OperationalError, match="readonly|read-only|query_only"):
            conn.execute("INSERT INTO meta (key, value, updated_utc) VALUES ('x', 'y', 'z')")
        with pytest.raises(sqlite3.OperationalError):
            conn.execute("DELETE FROM events")
    finally:
        conn.close()


_WRITER = """
import sqlite3, sys
conn = sqlite3.connect(sys.argv[1], isolation_level=None, timeout=5)
conn.execute("PRAGMA journal_mode=WAL")
conn.execute("BEGIN IMMEDIATE")
conn.execute("INSERT INTO events (time_utc, level, kind, message) VALUES "
             "('2027-02-15T20:00:00.000000+00:00', 'info', 'writer', 'uncommitted')")
print("holding", flush=True)
sys.stdin.readline()
conn.execute("ROLLBACK")
conn.close()
"""


def test_read_commands_work_while_the_service_holds_a_write_transaction(day, capsys):
    writer = subprocess.Popen([sys.executable, "-c", _WRITER, str(day.path)],
                              stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    try:
        assert writer.stdout.readline().strip() == "holding"
        for argv, _, env in READ_COMMANDS:
            if env:
                continue  # the gate runs the same `today` as above
            rc = main([*argv, "--db", str(day.path)])
            captured = capsys.readouterr()
            assert rc in (0, 1), (argv, captured.err)
            assert "locked" not in captured.err
        # The uncommitted event is invisible to readers (WAL snapshot isolation).
        assert main(["export", "--from", D, "--what", "events", "--format", "json",
                     "--db", str(day.path)]) == 0
        events = json.loads(capsys.readouterr().out)
        assert all(e["kind"] != "writer" for e in events)
    finally:
        writer.stdin.write("\n")
        writer.stdin.flush()
        writer.wait(timeout=10)
    assert writer.returncode == 0


def test_results_command_table_and_json(day, capsys):
    assert main(["results", "--db", str(day.path), "--from", "2027-02-01", "--to", D]) == 0
    text = capsys.readouterr().out
    assert text.splitlines()[0] == D
    assert max(len(line) for line in text.splitlines()) <= 80
    assert text.count(" am ") + text.count(" pm ") == 12
    assert main(["results", "--db", str(day.path), "--from", D, "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    conn = storeread.open_readonly(day.path)
    try:
        # Each row also names the configuration that produced it (tests/test_provenance.py).
        assert [{k: v for k, v in r.items() if k != "configuration_id"}
                for r in out["results"]] == storeread.results_between(conn, D, D)
    finally:
        conn.close()
    assert (out["from"], out["to"]) == (D, D)
    assert main(["results", "--db", str(day.path), "--from", "2020-01-01"]) == 1
    assert "no session results" in capsys.readouterr().out
    assert main(["results", "--db", str(day.path), "--from", D, "--to", "2027-02-01"]) == 64
    assert "swap them" in capsys.readouterr().err


# --------------------------------------------------------------------------- start-up

def test_plot_starts_without_the_modules_its_start_up_no_longer_needs(day):
    """``plot`` reads the configuration without ``logging`` (used by one deprecation
    warning) and builds its parser without ``shutil`` (and with it bz2 and lzma): the
    cuts that bring its start within 3 times a bare interpreter's (DEVELOPERS.md)."""
    argv = ["plot", "--date", D, "--channel", "500", "--session", "am", "--db",
            str(day.path)]
    result = subprocess.run([sys.executable, "-c", _PROBE, *argv], capture_output=True,
                            text=True, cwd=ROOT, timeout=60,
                            env={**os.environ, "HELIOTROPE_CONFIG": str(CONFIG_PATH)})
    assert result.returncode == 0, result.stderr
    info = json.loads(result.stdout.strip().splitlines()[-1])
    assert info["rc"] == 0 and "Langley plot" in info["out"]
    loaded = set(info["modules"])
    assert not loaded & {"logging", "shutil", "bz2", "lzma", "numpy"}, \
        sorted(loaded & {"logging", "shutil", "bz2", "lzma", "numpy"})



def test_plot_on_a_store_with_its_configuration_parses_no_yaml(day, tmp_path):
    """The configuration the store recorded is validated from its JSON form: ``plot``
    and ``report`` without ``--config`` never load PyYAML (about 20 ms of start)."""
    from daemon.store.writer import Store

    path = tmp_path / "recorded.db"
    path.write_bytes(day.path.read_bytes())
    with Store.open(path) as store:
        store.record_configuration(CONFIG_PATH.read_text(), str(CONFIG_PATH), "0.1.0",
                                   dt.datetime(2027, 2, 16, tzinfo=dt.UTC))
    for argv in (["plot", "--date", D, "--channel", "500"], ["report", "--date", D]):
        result = subprocess.run([sys.executable, "-c", _PROBE, *argv, "--db", str(path)],
                                capture_output=True, text=True, cwd=ROOT, timeout=60,
                                env={**os.environ, "HELIOTROPE_CONFIG": "/nonexistent"})
        assert result.returncode == 0, result.stderr
        info = json.loads(result.stdout.strip().splitlines()[-1])
        assert info["rc"] == 0, info
        assert "yaml" not in info["modules"], argv[0]

def _help(parser, argv: list[str]) -> str:
    import contextlib
    import io

    out = io.StringIO()
    with contextlib.redirect_stdout(out), pytest.raises(SystemExit):
        parser.parse_args(argv)
    return out.getvalue()


def test_a_parser_narrowed_to_one_command_parses_and_helps_as_the_whole_one():
    from daemon.commands.cli import build_parser

    whole = build_parser()
    commands = next(a for a in whole._actions if a.dest == "command").choices
    assert {"plot", "report", "status", "demo", "ssh-gate", "check-config"} <= set(commands)
    for name in commands:
        narrowed = build_parser([name])
        assert list(next(a for a in narrowed._actions if a.dest == "command").choices) \
            == [name]
        assert _help(narrowed, [name, "--help"]) == _help(whole, [name, "--help"]), name
    argv = ["plot", "--date", D, "--channel", "870", "--session", "pm", "--db", "x.db"]
    assert vars(build_parser(argv).parse_args(argv)) == vars(whole.parse_args(argv))
    # No command, or not one: the whole parser, whose error lists every command.
    assert set(next(a for a in build_parser(["--help"])._actions
                    if a.dest == "command").choices) == set(commands)
    assert set(next(a for a in build_parser(["plto"])._actions
                    if a.dest == "command").choices) == set(commands)


def test_the_libyaml_loader_reads_every_shipped_configuration_as_the_strict_one():
    """PyYAML's own pure-Python loader (through our strict rules) is the reference for
    the libyaml-backed one used first: same data for every file in config/, and the
    same refusals, raised by the fast loader itself (not only by the fall-back)."""
    import yaml

    from daemon.config import yamltext

    if not yaml.__with_libyaml__:
        pytest.skip("this PyYAML has no libyaml: the strict loader is the only one")
    for path in sorted((ROOT / "config").glob("*.yaml")):
        text = path.read_text()
        strict = yamltext._StrictLoader(text)
        fast = yamltext._FastStrictLoader(text)
        try:
            assert fast.get_single_data() == strict.get_single_data(), path.name
        finally:
            strict.dispose()
            fast.dispose()
    refused = {"a: &x 1\nb: *x\n": "anchor &x is not allowed",
               "a: 1\nb: *x\n": "alias *x is not allowed",
               "a: 1\na: 2\n": "a: key given twice, at line 1 and line 2",
               "a: " + "[" * 70 + "]" * 70 + "\n": "nested more than 64 levels deep",
               "a: " + "9" * 80 + "\n": "whole number",
               "a: 2027-02-30\n": "is not a date",
               "<<: {b: 1}\n": "merge key << is not allowed"}
    # Columns count characters in both, after a two-byte character too.
    refused['site:\n  x: ["Pico Sereno é", &a 1]\n'] = "line 2, column 24: anchor &a"
    for text, message in refused.items():
        messages = []
        for loader in (yamltext._FastStrictLoader, yamltext._StrictLoader):
            with pytest.raises(yamltext._Refused) as caught:
                yamltext._load(loader, text)
            messages.append(str(yamltext._refusal(caught.value)))
        assert message in messages[0], (text[:20], messages[0])
        assert messages[0] == messages[1]  # the same words at the same line and column
        with pytest.raises(yamltext.ConfigError, match=re.escape(messages[1])):
            yamltext.parse_yaml(text)
    # A control character after a refusal: PyYAML's reader reports it first, so the
    # configuration's message does too.
    with pytest.raises(yamltext.ConfigError, match="control character U\\+0007"):
        yamltext.parse_yaml("a: &x 1\nb: 2\nc: \x07\n")
