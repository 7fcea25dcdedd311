"""``heliotrope``: the operator's command.

Read commands (``today``, ``plan`` from the store) open the store read-only with the
standard library and import nothing heavy, so they answer fast over SSH and never
lock the service out. Heavy modules (numpy, pvlib, sqlite-utils) are imported inside
the commands that need them.

Exit codes: 0 done; 1 nothing to show; 64 bad usage; 65 bad input data;
66 a file that should exist does not; 69 the simulator or a device is unavailable;
78 bad configuration (sysexits.h).
"""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Sequence
from datetime import date
from pathlib import Path

from daemon.commands.errors import (
    EX_CONFIG,
    EX_NOINPUT,
    EX_UNAVAILABLE,
    EX_USAGE,
    CommandError,
)
from daemon.commands.tables import dumps, results_table, table

DEFAULT_DB = "/var/lib/heliotrope/heliotrope.db"
DEMO_MAX_DAYS = 366
DEMO_DATE = date(2027, 2, 15)
REPO_CONFIG = Path(__file__).resolve().parents[2] / "config"


def _default_db() -> str:
    return os.environ.get("HELIOTROPE_DB", DEFAULT_DB)


def _parse_date(text: str) -> date:
    try:
        return date.fromisoformat(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a date; use YYYY-MM-DD") from None


def _load_config(path: str):
    from daemon.config.settings import ConfigError, load_config
    try:
        return load_config(path)
    except ConfigError as exc:
        raise CommandError(str(exc), EX_CONFIG) from None


# --------------------------------------------------------------------------- commands

def cmd_check_config(args: argparse.Namespace) -> int:
    cfg = _load_config(args.file)
    try:
        warnings = _check_store_path(args.file, cfg.store_path)
    except OSError as exc:  # e.g. a state directory this user may not look into
        warnings = [f"store.path: cannot look at {cfg.store_path} as this user ({exc}); "
                    "run check-config as the service's user to check it"]
    for key, port in (("radiometer", cfg.radiometer), ("tracker", cfg.tracker)):
        # A URL (socket://, loop://, rfc2217://...) names no device file to look for.
        if "://" in port.url:
            continue
        if os.path.exists(port.url):
            print(f"instrument.{key}.port: {port.url} exists on this machine")
        else:
            warnings.append(f"instrument.{key}.port: {port.url} does not exist on this "
                            "machine; fine on a bench, but on the station check the cable "
                            "and `ls -l /dev/serial/by-id/`")
    for line in warnings:
        print(f"WARNING {line}", file=sys.stderr)
    names = ", ".join(ch.name for ch in cfg.channels)
    print(f"{args.file}: ok - {cfg.site.name}, {len(cfg.channels)} channels ({names}), "
          f"store {cfg.store_path}")
    return 0


def _check_store_path(source: str, store_path: str) -> list[str]:
    """Refuse a store path the service could never open; return warnings for the rest."""
    path = Path(store_path)

    def refuse(problem: str) -> CommandError:
        return CommandError(f"{source}: store.path: {problem}", EX_CONFIG)

    if path.is_dir():
        raise refuse(f"{path} is a directory; give the path of the store file in it, "
                     f"for example {path / 'heliotrope.db'}")
    parent = path.parent
    if parent.exists():
        if not parent.is_dir():
            raise refuse(f"{parent} is not a directory; put the store in a directory")
        return []
    # The service creates missing directories (systemd's StateDirectory= makes the
    # default one), so only a non-directory in the way is an error.
    ancestor = next(p for p in parent.parents if p.exists())
    if not ancestor.is_dir():
        raise refuse(f"{ancestor} is not a directory, so {parent} cannot be created")
    return [f"store.path: directory {parent} does not exist on this machine yet; the "
            f"service creates it at start, which needs write access to {ancestor}"]


def cmd_today(args: argparse.Namespace) -> int:
    from daemon.store.reader import latest_results

    rows = _read_store(args.db, latest_results)
    if args.json:
        print(dumps({"results": rows}))
        return 0
    if not rows:
        print(f"no session results yet in {args.db}")
        return 1
    print(f"preliminary results for {rows[0]['date']}")
    print(results_table(rows))
    return 0


def cmd_plan(args: argparse.Namespace) -> int:
    day = args.date
    plan_dict = None
    if args.config is None and Path(args.db).exists():
        from daemon.store.reader import stored_plan

        plan_dict = _read_store(args.db,
                                lambda conn: stored_plan(conn, day.isoformat() if day else None))
    if plan_dict is None:
        if args.config is None:
            raise CommandError(f"no stored plan{' for ' + str(day) if day else ''} in "
                               f"{args.db}; pass --config FILE to compute one", EX_NOINPUT)
        from daemon.station.planner import plan_day
        cfg = _load_config(args.config)
        plan_dict = plan_day(cfg, day or date.today()).to_dict()
    if args.json:
        print(dumps(plan_dict))
        return 0
    print(plan_table(plan_dict))
    return 0


def plan_table(plan: dict) -> str:
    """A stored or computed plan as an aligned table, UTC with local time beside it."""
    from datetime import datetime
    from zoneinfo import ZoneInfo

    tz = ZoneInfo(plan.get("timezone") or "UTC")

    def times(iso: str) -> tuple[str, str]:
        t = datetime.fromisoformat(iso)
        return t.strftime("%H:%M:%S"), t.astimezone(tz).strftime("%H:%M:%S")

    items = [(t["time_utc"], t["session"], f"{t['airmass']:.2f}",
              f"{t['apparent_zenith_deg']:.2f}", f"{t['azimuth_deg']:.1f}")
             for t in plan["targets"]]
    items += [(e["time_utc"], e["kind"], "", "", "") for e in plan.get("events", [])]
    items.sort(key=lambda r: datetime.fromisoformat(r[0]))  # in time, across 00:00 UTC
    rows = [[*times(when), *rest] for when, *rest in items]
    head = f"plan for {plan['date']} at {plan.get('site_name', '?')} (local time {tz.key})"
    out = [head, table(["UTC", "local", "what", "air mass", "zenith", "azimuth"], rows,
                       [False, False, False, True, True, True])]
    for s in plan.get("skipped", []):
        out.append(f"skipped {s['session']} m={s['airmass']:g}: {s['reason']}")
    out += [f"note: {n}" for n in plan.get("notes", [])]
    return "\n".join(out)


def cmd_demo(args: argparse.Namespace) -> int:
    import tempfile

    from daemon.station.bench import (
        BenchError,
        campaign_days,
        next_campaign_day,
        run_simulated_campaign,
    )
    if args.config is None:
        args.config = str(REPO_CONFIG / "pico-sereno.yaml")
        if not Path(args.config).exists():
            raise CommandError("the demo's site configuration comes from the source tree "
                               f"({args.config}), which this installation does not have; "
                               "pass --config with config/pico-sereno.yaml from a copy of "
                               "the sources", EX_NOINPUT)
    if args.days < 1 or args.days > DEMO_MAX_DAYS:
        raise CommandError(f"--days {args.days}: give 1 to {DEMO_MAX_DAYS} days", EX_USAGE)
    if args.append and not args.db:
        raise CommandError("--append adds days to the store given with --db; pass "
                           "--db FILE", EX_USAGE)
    cfg = _load_config(args.config)
    with tempfile.TemporaryDirectory(prefix="heliotrope-demo-") as tmp:
        store_path = Path(args.db) if args.db else Path(tmp) / "demo.db"
        first = args.date_given or DEMO_DATE
        if args.append:
            if not store_path.exists():
                raise CommandError(f"{store_path} does not exist; make it first with "
                                   f"`heliotrope demo --db {store_path}`", EX_NOINPUT)
            from daemon.store.reader import configuration_origins
            if "service" in _read_store(str(store_path), configuration_origins):
                raise CommandError(f"{store_path} holds a station's measurements (its service "
                                   "recorded a configuration there); simulated days never go "
                                   "into a station's store: append to a store `heliotrope "
                                   "demo` made", EX_USAGE)
            try:
                first = args.date_given or next_campaign_day(store_path) or DEMO_DATE
            except BenchError as exc:
                raise CommandError(str(exc), EX_NOINPUT) from None
        elif args.db and store_path.exists():
            raise CommandError(f"{store_path} already exists; the demo writes a fresh store. "
                               "Choose a new path, remove the old file, or add days to it "
                               "with --append.", EX_USAGE)
        days = campaign_days(first, args.days)
        if not args.json:
            span = str(first) if len(days) == 1 else f"{days[0]} to {days[-1]}"
            print(f"simulating {span} at {cfg.site.name} "
                  f"(scenario {args.scenario}, seed {args.seed}, port {args.port}) ...",
                  flush=True)

        def progress(run) -> None:
            if not args.json and len(days) > 1:
                ok = sum(bool(r["accepted"]) for r in run.results)
                print(f"{run.day}: {run.targets_ok} of {run.targets_planned} targets, "
                      f"{ok} of {len(run.results)} channel fits accepted "
                      f"({run.wall_s:.1f} s)", flush=True)

        try:
            runs = run_simulated_campaign(cfg, days, store_path, args.scenario, args.seed,
                                          args.port, work_dir=Path(tmp), on_day=progress)
        except BenchError as exc:
            raise CommandError(str(exc), EX_UNAVAILABLE) from None
    run = runs[-1]
    truth = run.truth.get("channels", {})
    wall = sum(r.wall_s for r in runs)
    if args.json:
        out = {"results": run.results,
               "truth": {k: {"v0_1au": v["v0_1au"]} for k, v in truth.items()},
               "targets_planned": run.targets_planned, "targets_ok": run.targets_ok,
               "wall_s": round(wall, 3)}
        if len(runs) > 1:
            out["days"] = [{"date": r.day.isoformat(), "targets_planned": r.targets_planned,
                            "targets_ok": r.targets_ok, "results": r.results} for r in runs]
        print(dumps(out))
        return 0
    if len(runs) > 1:
        print(f"last day, {run.day}:")
    print(f"{run.targets_ok} of {run.targets_planned} targets measured; "
          "V0 normalised to 1 AU")
    print(results_table(run.results, truth))
    print(f"wall time {wall:.1f} s")
    if args.db and len(runs) > 1:
        print(f"next: `heliotrope calibrate --from {days[0]} --to {days[-1]} --db {args.db}`, "
              f"then `heliotrope export --what aod --from {days[0]} --to {days[-1]} "
              f"--db {args.db}`")
    return 0


def cmd_probe(args: argparse.Namespace) -> int:
    from daemon.commands.probe import run
    return run(args, _load_config(args.config))


def cmd_calibrate(args: argparse.Namespace) -> int:
    from daemon.commands.calibrate import calibrate_command
    return calibrate_command(args)


def cmd_refit(args: argparse.Namespace) -> int:
    from daemon.commands.refit import refit_command
    return refit_command(args)


# --------------------------------------------------------------------------- operator's view
# status, results, export, plot, report, ssh-gate: each lives in its own module, imported
# only when the command runs, so `today` and the others start fast.

def _store_dates(conn) -> list[dict]:
    """Per local date of the store (a stored plan or a session result): the sessions
    fitted and, over them, the channels accepted of those fitted."""
    from daemon.store.reader import plans_from, results_between

    days: dict[str, dict] = {p["date"]: {"date": p["date"], "sessions": [], "accepted": 0,
                                         "fitted": 0} for p in plans_from(conn, date.min)}
    for r in results_between(conn, date.min, date.max):
        day = days.setdefault(r["date"], {"date": r["date"], "sessions": [], "accepted": 0,
                                          "fitted": 0})
        if r["session"] not in day["sessions"]:
            day["sessions"].append(r["session"])
        day["fitted"] += 1
        day["accepted"] += bool(r["accepted"])
    return [days[d] for d in sorted(days)]


def _read_store(db: str, read):
    """``read(conn)`` on a read-only connection to the store at ``db``, closed after; a
    store that cannot be opened or read (missing, not ours, damaged) is exit 66."""
    from daemon.store.reader import StoreReadError, open_readonly
    try:
        conn = open_readonly(db)
        try:
            return read(conn)
        finally:
            conn.close()
    except StoreReadError as exc:
        raise CommandError(str(exc), EX_NOINPUT) from None


def _list_dates(args: argparse.Namespace) -> int:
    """``results`` without ``--from``: what the store holds, one line per date."""
    days = _read_store(args.db, _store_dates)
    if args.json:
        print(dumps({"dates": days}))
        return 0
    if not days:
        print(f"no plans or session results yet in {args.db}")
        return 1
    print(table(["date", "sessions", "channels accepted of fitted (all sessions)"],
                [[d["date"], " ".join(d["sessions"]) or "none fitted",
                  f"{d['accepted']} of {d['fitted']}"] for d in days]))
    print(f"`heliotrope results --from {days[0]['date']} --to {days[-1]['date']}` "
          "shows the results")
    return 0


def cmd_results(args: argparse.Namespace) -> int:
    from daemon.store.reader import results_between
    if args.from_ is None:
        if args.to is not None:
            raise CommandError("--to needs --from; without both, the dates in the store "
                               "are listed", EX_USAGE)
        return _list_dates(args)
    last = args.to or args.from_
    if last < args.from_:
        raise CommandError(f"--to {last} is before --from {args.from_}; swap them", EX_USAGE)
    rows, configs = _read_store(args.db, lambda conn: _with_provenance(
        conn, results_between(conn, args.from_, last), args.from_, last))
    if args.json:
        print(dumps({"from": args.from_.isoformat(), "to": last.isoformat(), "results": rows,
                     "configurations": [configs[k] for k in sorted(configs)]}))
        return 0
    if not rows:
        print(f"no session results from {args.from_} to {last} in {args.db}")
        return 1
    for day in sorted({r["date"] for r in rows}):
        print(f"{day}")
        print(results_table([r for r in rows if r["date"] == day]))
    print(provenance_lines(rows, configs))
    return 0


def _with_provenance(conn, rows: list[dict], first: date, last: date):
    """The result rows, each with the ``configuration_id`` that produced it, and the
    recorded configurations they name (id -> row without the text)."""
    from daemon.store.reader import configurations_by_id, result_configurations

    ids = result_configurations(conn, first, last)
    for r in rows:
        r["configuration_id"] = ids.get((r["date"], r["session"], r["channel"]))
    configs = configurations_by_id(conn, {i for i in ids.values() if i is not None})
    return rows, configs


def provenance_lines(rows: list[dict], configs: dict[int, dict]) -> str:
    """Which configuration produced the results: one line per recorded configuration."""
    lines = []
    for cid in sorted({r["configuration_id"] for r in rows if r["configuration_id"]}):
        c = configs.get(cid)
        if c is not None:
            lines.append(f"configuration {cid}: sha256 {c['sha256'][:16]}, {c['origin']}, "
                         f"heliotrope {c['software_version']}, from {c['source']}")
    if any(r["configuration_id"] is None for r in rows):
        lines.append("some results were stored before configurations were recorded")
    return "\n".join(lines)


def cmd_status(args: argparse.Namespace) -> int:
    from daemon.commands.status import cmd_status as run
    return run(args)


def cmd_export(args: argparse.Namespace) -> int:
    from daemon.commands.export import cmd_export as run
    return run(args)


def cmd_plot(args: argparse.Namespace) -> int:
    from daemon.commands.plot import cmd_plot as run
    return run(args)


def cmd_report(args: argparse.Namespace) -> int:
    from daemon.commands.report import cmd_report as run
    return run(args)


def cmd_ssh_gate(args: argparse.Namespace) -> int:
    from daemon.commands.sshgate import cmd_ssh_gate as run
    return run(args, main)


def _add_operator_view(sub) -> None:
    db_help = "store path (default: %(default)s, from $HELIOTROPE_DB when set)"
    cfg_help = ("the service's configuration (default: the one the store recorded, else "
                "$HELIOTROPE_CONFIG, else /etc/heliotrope/heliotrope.yaml)")

    c = sub.add_parser("status", help="is the service alive and well; exit 0 ok, 1 warning, "
                       "2 stale or failing")
    c.add_argument("--warn-minutes", type=float, default=5.0, metavar="MIN",
                   help="heartbeat age that is a warning (default: %(default)s)")
    c.add_argument("--crit-minutes", type=float, default=15.0, metavar="MIN",
                   help="heartbeat age that is stale, critical (default: %(default)s)")
    c.add_argument("--db", default=_default_db(), help=db_help)
    c.add_argument("--json", action="store_true", help="print JSON")
    c.set_defaults(func=cmd_status)

    c = sub.add_parser("results", help="session results of a range of dates; without "
                       "--from, the dates and sessions the store holds")
    c.add_argument("--from", dest="from_", type=_parse_date, metavar="D1",
                   help="first local date, YYYY-MM-DD (default: list the store's dates)")
    c.add_argument("--to", type=_parse_date, metavar="D2",
                   help="last local date, inclusive (default: D1)")
    c.add_argument("--db", default=_default_db(), help=db_help)
    c.add_argument("--json", action="store_true", help="print JSON")
    c.set_defaults(func=cmd_results)

    c = sub.add_parser("export", help="stored data as CSV or JSON, streamed")
    _add_dates(c)
    c.add_argument("--what", required=True,
                   choices=("measurements", "samples", "results", "aod", "events",
                            "readings"),
                   help="readings: the CSV file `heliotrope refit` reads")
    c.add_argument("--format", default="csv", choices=("csv", "json", "netcdf"),
                   help="default: %(default)s; netcdf (CF-1.8, NetCDF-4) is for --what "
                   "measurements with --out, and needs the netcdf extra")
    c.add_argument("--out", metavar="FILE", help="write here instead of standard output")
    c.add_argument("--db", default=_default_db(), help=db_help)
    c.set_defaults(func=cmd_export)

    c = sub.add_parser("plot", help="the Langley plot of one channel in the terminal")
    c.add_argument("--date", type=_parse_date, required=True, help="local date, YYYY-MM-DD")
    c.add_argument("--channel", required=True, help="channel name, as in the configuration")
    c.add_argument("--session", choices=("am", "pm"), help="one session (default: both)")
    c.add_argument("--png", metavar="FILE", help="also draw a PNG (needs the plot extra)")
    c.add_argument("--config", metavar="FILE", help=cfg_help)
    c.add_argument("--db", default=_default_db(), help=db_help)
    c.add_argument("--json", action="store_true", help="print the points and the fit as JSON")
    c.set_defaults(func=cmd_plot)

    c = sub.add_parser("report", help="one self-contained HTML page about one day")
    c.add_argument("--date", type=_parse_date, required=True, help="local date, YYYY-MM-DD")
    c.add_argument("--out", metavar="FILE", help="write here (default: standard output)")
    c.add_argument("--config", metavar="FILE", help=cfg_help)
    c.add_argument("--db", default=_default_db(), help=db_help)
    c.set_defaults(func=cmd_report)

    c = sub.add_parser("ssh-gate", help="forced command for an SSH key: run only the read "
                       "commands named in $SSH_ORIGINAL_COMMAND")
    c.add_argument("--db", default=_default_db(), help=db_help)
    c.add_argument("--config", metavar="FILE", help=cfg_help)
    c.set_defaults(func=cmd_ssh_gate)


# --------------------------------------------------------------------------- parser

def _add_dates(c: argparse.ArgumentParser, to_required: bool = False) -> None:
    """``--from D1 [--to D2]``: a range of local dates at the site, inclusive."""
    c.add_argument("--from", dest="from_", type=_parse_date, required=True, metavar="D1",
                   help="first local date, YYYY-MM-DD")
    c.add_argument("--to", type=_parse_date, required=to_required, metavar="D2",
                   help="last local date, inclusive" + ("" if to_required else
                                                        " (default: D1)"))


def _add_service_config(c: argparse.ArgumentParser) -> None:
    """``--config FILE``, defaulting to the service's own configuration."""
    c.add_argument("--config", default=os.environ.get("HELIOTROPE_CONFIG",
                                                      "/etc/heliotrope/heliotrope.yaml"),
                   metavar="FILE", help="configuration file (default: %(default)s, from "
                   "$HELIOTROPE_CONFIG when set)")


def _help_width() -> int:
    """The width argparse's help formatter takes from ``shutil.get_terminal_size``, found
    the same way ($COLUMNS, else the terminal, else 80) without importing shutil, which
    brings bz2 and lzma: 5 to 10 ms of every command's start."""
    try:
        columns = int(os.environ.get("COLUMNS", "0"))
    except ValueError:
        columns = 0
    if columns <= 0:
        try:
            columns = os.get_terminal_size(sys.__stdout__.fileno()).columns
        except (AttributeError, ValueError, OSError):
            columns = 0
    return (columns or 80) - 2


class _Formatter(argparse.HelpFormatter):
    def __init__(self, prog: str, indent_increment: int = 2, max_help_position: int = 24,
                 width: int | None = None):
        super().__init__(prog, indent_increment, max_help_position,
                         _help_width() if width is None else width)


class _Parser(argparse.ArgumentParser):
    """``ArgumentParser`` whose help (and its subcommands', which take its class) is
    formatted by :class:`_Formatter`."""

    def __init__(self, *args, **kwargs):
        kwargs.setdefault("formatter_class", _Formatter)
        super().__init__(*args, **kwargs)


class _Skipped:
    """A subcommand left out of this parser: its arguments are not built."""

    def add_argument(self, *args, **kwargs) -> None:
        pass

    def set_defaults(self, **kwargs) -> None:
        pass


class _OnlyCommand:
    """The subcommands, narrowed to the one on the command line. Building every
    subparser adds about 6 ms to each start, so a command line that names a command
    builds only that one; without one (``--help``, a typo) every command is built, so
    the listing and argparse's choices are whole."""

    def __init__(self, sub, command: str | None):
        self._sub, self.command, self.found = sub, command, False

    def add_parser(self, name: str, **kwargs):
        if self.command is not None and name != self.command:
            return _Skipped()
        self.found = True
        return self._sub.add_parser(name, **kwargs)


def build_parser(argv: Sequence[str] | None = None) -> argparse.ArgumentParser:
    """The parser; for ``argv`` naming a command, with that command's subparser only."""
    command = argv[0] if argv and not argv[0].startswith("-") else None
    p = _Parser(prog="heliotrope", description=(
        "Operate a heliotrope sun-radiometer station: read results, plans and "
        "configuration, or run a simulated day on the bench."))
    sub = _OnlyCommand(p.add_subparsers(dest="command", required=True, metavar="COMMAND"),
                       command)

    c = sub.add_parser("check-config", help="validate a configuration file")
    c.add_argument("file")
    c.set_defaults(func=cmd_check_config)

    c = sub.add_parser("today", help="the latest day's preliminary results")
    c.add_argument("--db", default=_default_db(), help="store path (default: %(default)s)")
    c.add_argument("--json", action="store_true", help="print JSON")
    c.set_defaults(func=cmd_today)

    c = sub.add_parser("plan", help="the day's plan: stored, or computed with --config")
    c.add_argument("--date", type=_parse_date, help="local date at the site, YYYY-MM-DD")
    c.add_argument("--config", help="compute the plan from this configuration")
    c.add_argument("--db", default=_default_db(), help="store path (default: %(default)s)")
    c.add_argument("--json", action="store_true", help="print JSON")
    c.set_defaults(func=cmd_plan)

    c = sub.add_parser("demo", help="a simulated clear day on the bench, ending in the table")
    c.add_argument("--config", help="site configuration (default: the source tree's "
                   "config/pico-sereno.yaml)")
    c.add_argument("--scenario", default="pico-sereno-stable")
    c.add_argument("--date", type=_parse_date, dest="date_given", metavar="DATE",
                   help=f"first simulated local date (default: {DEMO_DATE}; with --append, "
                   "the day after the store's newest)")
    c.add_argument("--days", type=int, default=1, metavar="N",
                   help="simulate N consecutive days into one store, enough for "
                   "`calibrate` (default: %(default)s)")
    c.add_argument("--append", action="store_true",
                   help="add the days to the existing store given with --db")
    c.add_argument("--seed", type=int, default=1)
    c.add_argument("--port", default="pty", help="pty or tcp:0 (default: %(default)s)")
    c.add_argument("--db", help="keep the store at this new path (default: a temporary one)")
    c.add_argument("--json", action="store_true", help="print JSON")
    c.set_defaults(func=cmd_demo)

    c = sub.add_parser(
        "probe", help="identify both devices and read them once; never moves the tracker",
        description="First contact with the instrument: sends ID, one BURST and HK to the "
        "radiometer and ID and STATUS to the tracker, and reports each round-trip time. "
        "It only reads: it never moves the tracker, never sets a clock, never resets a "
        "device. Stop the service first (it holds the ports). Exit 0 when everything "
        "answered, 69 otherwise.")
    _add_service_config(c)
    c.add_argument("--radiometer-port", metavar="URL",
                   help="probe this port instead of the configured one "
                        "(e.g. socket://127.0.0.1:7001 for heliotrope-sim --port tcp:7001)")
    c.add_argument("--tracker-port", metavar="URL",
                   help="probe this port instead of the configured one")
    c.add_argument("--json", action="store_true", help="print one JSON object")
    c.set_defaults(func=cmd_probe)

    c = sub.add_parser(
        "calibrate", help="combine a campaign's accepted sessions into a stored calibration "
        "(writes to the store)",
        description="Combines the accepted session fits from D1 to D2 per channel: a robust "
        "mean V0 at 1 AU, its repeatability (percent rms), the number of sessions, the "
        "sessions that disagree (flagged) and the drift per year. The result is stored as a "
        "calibration record and the aerosol optical depth of every measurement in the range "
        "is computed and stored. This command WRITES to the store: it opens it with the "
        "service's writer (safe while the service runs).")
    _add_dates(c, to_required=True)
    c.add_argument("--config", metavar="FILE", help="configuration file (default: the one "
                   "the store recorded, else $HELIOTROPE_CONFIG, else "
                   "/etc/heliotrope/heliotrope.yaml)")
    c.add_argument("--db", help="store path (default: $HELIOTROPE_DB, else the "
                   "configuration's store.path)")
    c.add_argument("--json", action="store_true", help="print JSON")
    c.set_defaults(func=cmd_calibrate)

    c = sub.add_parser(
        "refit", help="the session fit, offline, on a CSV file of readings",
        description="Fits readings from a CSV file with the header time_utc,channel,signal "
        "(optional columns pressure_hpa, detector_temp_c) exactly as the service fits a "
        "session; air masses come from the configuration's site. Touches no store. A "
        "malformed file gives its line number and exit code 65.")
    c.add_argument("--config", metavar="FILE", help="configuration file (default: the one "
                   "the store given with --db recorded)")
    c.add_argument("--db", metavar="STORE", help="take the configuration this store recorded "
                   "(read only; `export --what readings` writes the CSV from a store)")
    c.add_argument("--csv", required=True, metavar="READINGS", help="readings CSV file")
    c.add_argument("--json", action="store_true", help="print JSON")
    c.set_defaults(func=cmd_refit)

    _add_operator_view(sub)
    if not sub.found:
        return build_parser()  # not a command: the whole parser, whose error lists them
    return p


def main(argv: Sequence[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    args = build_parser(argv).parse_args(argv)
    try:
        return args.func(args)
    except CommandError as exc:
        print(f"heliotrope {args.command}: {exc}", file=sys.stderr)
        return exc.code
    except BrokenPipeError:
        return 0
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
