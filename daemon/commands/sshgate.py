"""``heliotrope ssh-gate``: the forced command of a data puller's SSH key.

One line in ``~/.ssh/authorized_keys`` of an account that may read the store (full
path of the program and of the store in practice; see README.md, "Over SSH")::

    command="heliotrope ssh-gate --db /srv/store.db",restrict ssh-ed25519 AAAA... puller@lab

sshd then runs this gate whatever the client asked for, and puts the client's command
line in ``SSH_ORIGINAL_COMMAND``. The gate lets through only the read commands and
their read-only options, each value checked against a strict pattern, and runs them
in this process through :func:`daemon.commands.cli.main` with an argument list it builds
itself. No shell is ever started; the command line is split with :mod:`shlex` after
a character check that already refuses every shell metacharacter. Options that
write files (``--out``, ``--png``) or pick another store or configuration (``--db``,
``--config``) are refused: the store and configuration are the gate's own
(``--db``/``--config`` in the forced command, else the usual defaults). Output goes to
standard output only; a refusal is one line on standard error and exit code 77.
"""

from __future__ import annotations

import argparse
import os
import re
import shlex
import sys
from collections.abc import Callable, Sequence

EX_NOPERM = 77  # sysexits.h: permission denied
MAX_COMMAND_CHARS = 512
MAX_WORDS = 16
# Letters, digits, space and . _ : = - only: no quote, slash, backslash, $, `, ;, |, &,
# <, >, (, ), {, }, *, ?, !, ~, #, newline or anything outside ASCII can pass.
_SAFE_TEXT = re.compile(r"[A-Za-z0-9 ._:=-]*")


def _pattern(regex: str, what: str) -> Callable[[str], str | None]:
    rx = re.compile(regex)

    def check(value: str) -> str | None:
        return None if rx.fullmatch(value) and ".." not in value else what
    return check


_DATE = _pattern(r"\d{4}-\d{2}-\d{2}", "a date as YYYY-MM-DD")
_MINUTES = _pattern(r"\d{1,4}(\.\d{1,3})?", "a number of minutes")
_CHANNEL = _pattern(r"[A-Za-z0-9_][A-Za-z0-9_.-]{0,31}", "a channel name")


def _choice(*allowed: str) -> Callable[[str], str | None]:
    def check(value: str) -> str | None:
        return None if value in allowed else f"one of {', '.join(allowed)}"
    return check


FLAG = None  # an option without a value
# Command -> its allowed options -> None for a flag, or the value's check.
ALLOWED: dict[str, dict[str, Callable[[str], str | None] | None]] = {
    "status": {"--json": FLAG, "--warn-minutes": _MINUTES, "--crit-minutes": _MINUTES},
    "today": {"--json": FLAG},
    "results": {"--from": _DATE, "--to": _DATE, "--json": FLAG},
    "plan": {"--date": _DATE, "--json": FLAG},
    "export": {"--from": _DATE, "--to": _DATE,
               "--what": _choice("measurements", "samples", "results", "aod", "events"),
               "--format": _choice("csv", "json")},
    "plot": {"--date": _DATE, "--channel": _CHANNEL, "--session": _choice("am", "pm"),
             "--json": FLAG},
    "report": {"--date": _DATE},
}
NEEDS_CONFIG = ("plot", "report")
WRITING_OPTIONS = ("--out", "--png", "--db", "--config")


class Refused(Exception):
    """The client's command is not allowed through the gate; the message says why."""


def vet(command_line: str | None) -> list[str]:
    """Check the client's command line and return the argv to run (without store paths).

    Parameters
    ----------
    command_line : str or None
        ``SSH_ORIGINAL_COMMAND`` as sshd passed it.

    Returns
    -------
    list of str
        A new argument list for :func:`daemon.commands.cli.main`, built from the allowed
        command and checked options only.

    Raises
    ------
    Refused
        Anything that is not a read command with allowed options and valid values.
    """
    allowed = ", ".join(ALLOWED)
    if command_line is None or not command_line.strip():
        raise Refused("this key runs read commands only, no login shell; ask for one, for "
                      f"example: ssh station heliotrope today --json (allowed: {allowed})")
    if len(command_line) > MAX_COMMAND_CHARS:
        raise Refused(f"the command is {len(command_line)} characters long; the gate takes "
                      f"at most {MAX_COMMAND_CHARS}")
    if not _SAFE_TEXT.fullmatch(command_line):
        bad = sorted({c for c in command_line if not _SAFE_TEXT.fullmatch(c)})
        shown = " ".join(repr(c) for c in bad[:8])
        raise Refused(f"the command contains characters the gate does not pass ({shown}); "
                      "use plain words, dates and options only: no quotes, paths, pipes, "
                      "redirections or substitutions")
    try:
        words = shlex.split(command_line, posix=True)
    except ValueError as exc:
        raise Refused(f"cannot split the command ({exc})") from None
    if len(words) > MAX_WORDS:
        raise Refused(f"{len(words)} words; the gate takes at most {MAX_WORDS}")
    if words and words[0] == "heliotrope":
        words = words[1:]
    if not words:
        raise Refused(f"no command given; allowed: {allowed}")
    command, rest = words[0], words[1:]
    if command == "help":
        return ["help"]
    if command not in ALLOWED:
        raise Refused(f"{command!r} is not a read command; allowed: {allowed}")
    spec = ALLOWED[command]
    argv = [command]
    seen: set[str] = set()
    i = 0
    while i < len(rest):
        word = rest[i]
        name, eq, inline = word.partition("=")
        if name in WRITING_OPTIONS:
            raise Refused(f"{name} is not allowed through the gate: it writes files or picks "
                          "another store or configuration; the output comes on standard "
                          "output (redirect it on your side)")
        if name not in spec:
            opts = ", ".join(spec) or "none"
            raise Refused(f"{word!r} is not an option the gate passes for {command} "
                          f"(allowed: {opts})")
        if name in seen:
            raise Refused(f"{name} is given twice")
        seen.add(name)
        check = spec[name]
        if check is FLAG:
            if eq:
                raise Refused(f"{name} takes no value")
            argv.append(name)
            i += 1
            continue
        if eq:
            value = inline
            i += 1
        else:
            if i + 1 >= len(rest):
                raise Refused(f"{name} needs a value")
            value = rest[i + 1]
            i += 2
        problem = check(value)
        if problem is not None:
            raise Refused(f"{name} {value!r}: expected {problem}")
        argv += [name, value]
    return argv


def help_text() -> str:
    lines = ["read commands this key may run (heliotrope COMMAND [options]):"]
    for command, spec in ALLOWED.items():
        opts = " ".join(f"[{o}]" if c is FLAG else f"[{o} X]" for o, c in spec.items())
        lines.append(f"  {command} {opts}".rstrip())
    lines.append("output comes on standard output; redirect it on your side")
    return "\n".join(lines)


def run_gate(command_line: str | None, db: str, config: str | None,
             main: Callable[[Sequence[str]], int]) -> int:
    """Vet ``command_line`` and run it with ``main`` (the parser's
    :func:`daemon.commands.cli.main`, passed in so the gate does not import the parser
    that dispatches to it); return the exit code."""
    try:
        argv = vet(command_line)
    except Refused as exc:
        print(f"heliotrope ssh-gate: refused: {exc}", file=sys.stderr)
        return EX_NOPERM
    if argv == ["help"]:
        print(help_text())
        return 0
    argv += ["--db", db]
    if argv[0] in NEEDS_CONFIG and config:
        argv += ["--config", config]
    try:
        return main(argv)
    except SystemExit as exc:  # argparse, should the vetting ever let a bad value through
        return exc.code if isinstance(exc.code, int) else 64


def cmd_ssh_gate(args: argparse.Namespace, main: Callable[[Sequence[str]], int]) -> int:
    return run_gate(os.environ.get("SSH_ORIGINAL_COMMAND"), args.db, args.config, main)
