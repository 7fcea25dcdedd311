"""Faults the simulator can inflict on the link and the devices, at a rate or on schedule.

Two families:

- **Line faults**, drawn per reply with a probability (:class:`LineFaults`): garbage
  bytes ahead of the reply, the reply dropped, truncated, with one bit flipped (so its
  checksum fails), preceded by the previous reply again (stale), or held back longer
  than the host waits (late).
- **Scheduled events** (:class:`FaultEvent`), each at a local mean solar time of day
  [h] so that a scenario works on whatever date the host sets: one-shot line faults on
  the next reply of a device (``garbage``, ``drop``, ``truncate``, ``corrupt``,
  ``stale``, ``late``), a device ``reboot`` (silent for ``duration_s``, then a boot
  banner and fresh counters), the port vanishing and returning (``port_vanish``, gone
  for ``duration_s``), and a ``tracker_stall`` (the mount stops moving for
  ``duration_s`` of instrument time).

Wall-clock durations (``reboot``, ``port_vanish``, ``late``) are seconds of real time
because the host's timeouts and back-off are; a ``tracker_stall`` lasts instrument
seconds because the sun moves on the instrument's clock.

Everything here is plain data plus the damage function; the server applies it.
"""

from __future__ import annotations

import random
from dataclasses import dataclass, field, fields
from typing import Any

#: Kinds of scheduled event and the devices each may hit.
LINE_EVENT_KINDS = ("garbage", "drop", "truncate", "corrupt", "stale", "late")
DEVICE_EVENT_KINDS = ("reboot", "port_vanish")
EVENT_KINDS = LINE_EVENT_KINDS + DEVICE_EVENT_KINDS + ("tracker_stall",)
DEVICES = ("radiometer", "tracker")

#: Default hold of a late reply [s]: above the reference drivers' 2 s timeout, so the
#: host times out and retries; the late reply then arrives as a stale one.
DEFAULT_LATE_REPLY_S = 3.0


@dataclass(frozen=True)
class LineFaults:
    """Probabilities of damage to each reply, for reliability tests.

    ``drop``: the reply is not sent. ``garble``: a line of garbage bytes goes first.
    ``truncate``: only the first part of the reply is sent (then CR LF). ``corrupt``:
    one bit is flipped, so the checksum fails. ``stale``: the previous reply is sent
    again first. ``late``: the reply is held back ``late_reply_s`` (beyond the host's
    timeout).
    """

    drop: float = 0.0
    garble: float = 0.0
    truncate: float = 0.0
    corrupt: float = 0.0
    stale: float = 0.0
    late: float = 0.0

    def __post_init__(self) -> None:
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, bool) or not isinstance(value, int | float) or not (
                    0.0 <= value <= 1.0):
                raise ValueError(f"line fault {f.name}={value!r}: probability must be 0 to 1")

    @classmethod
    def parse(cls, spec: str) -> LineFaults:
        """From ``"drop=0.05,corrupt=0.02"``; raises ValueError saying what is wrong."""
        return parse_fault_spec(cls, spec)

    @property
    def any(self) -> bool:
        return any(getattr(self, f.name) for f in fields(self))


def parse_fault_spec(cls: type, spec: str, what: str = "line fault") -> Any:
    """``cls`` (a dataclass of probabilities) from ``"NAME=P,NAME=P"``; raises ValueError
    saying what is wrong."""
    values: dict[str, float] = {}
    names = [f.name for f in fields(cls)]
    for item in filter(None, (s.strip() for s in spec.split(","))):
        name, sep, value = item.partition("=")
        if not sep or name not in names:
            raise ValueError(f"{what} {item!r}: expected NAME=PROBABILITY with NAME "
                             f"one of {', '.join(names)}")
        try:
            prob = float(value)
        except ValueError:
            raise ValueError(f"{what} {item!r}: {value!r} is not a number") from None
        if not 0.0 <= prob <= 1.0:
            raise ValueError(f"{what} {item!r}: probability must be 0 to 1")
        values[name] = prob
    return cls(**values)


@dataclass(frozen=True)
class FaultEvent:
    """One scheduled fault.

    ``at_solar_h`` is local mean solar time [h] (UTC + longitude / 15 degrees). A link
    event fires once, at the first request after the instrument clock moves across it
    (a jump of a day or more is a new date, not a crossing). A ``tracker_stall`` is a
    window of instrument time, ``[at_solar_h, at_solar_h + duration_s)``, on every day
    the clock visits. ``duration_s`` [s] is wall time for ``reboot`` and
    ``port_vanish``, instrument time for ``tracker_stall``, unused for one-shot line
    faults.
    """

    kind: str
    at_solar_h: float
    device: str = "radiometer"
    duration_s: float = 0.0

    def __post_init__(self) -> None:
        if self.kind not in EVENT_KINDS:
            raise ValueError(f"fault kind {self.kind!r}: use one of {', '.join(EVENT_KINDS)}")
        if self.device not in DEVICES:
            raise ValueError(f"fault device {self.device!r}: use radiometer or tracker")
        if self.kind == "tracker_stall" and self.device != "tracker":
            raise ValueError("a tracker_stall happens to the tracker: set device: tracker "
                             "or leave it out")
        if not 0.0 <= self.at_solar_h < 24.0:
            raise ValueError(f"at_solar_h {self.at_solar_h!r} must lie in [0, 24) hours")
        if self.duration_s < 0:
            raise ValueError(f"duration_s {self.duration_s!r} must be 0 or more")


@dataclass(frozen=True)
class FaultPlan:
    """Every fault of a scenario: line faults at a rate, and scheduled events."""

    line: LineFaults = field(default_factory=LineFaults)
    late_reply_s: float = DEFAULT_LATE_REPLY_S
    events: tuple[FaultEvent, ...] = ()

    def for_device(self, device: str) -> tuple[FaultEvent, ...]:
        """The link-level events of one device (tracker stalls belong to the station)."""
        return tuple(e for e in self.events if e.device == device and e.kind != "tracker_stall")

    @property
    def stalls(self) -> tuple[FaultEvent, ...]:
        return tuple(e for e in self.events if e.kind == "tracker_stall")

    @property
    def vanishes(self) -> bool:
        return any(e.kind == "port_vanish" for e in self.events)


def solar_hour(epoch_s: float, longitude_deg: float) -> float:
    """Local mean solar time [h] at POSIX time ``epoch_s`` [s] and ``longitude_deg`` (east)."""
    return ((epoch_s / 3600.0) + longitude_deg / 15.0) % 24.0


def crossed(prev_epoch_s: float, now_epoch_s: float, at_solar_h: float,
            longitude_deg: float) -> bool:
    """True if the instrument clock went from ``prev`` to ``now`` across ``at_solar_h``.

    A clock set backward crosses nothing, and neither does a jump of a day or more:
    that is the host setting the date (a bench run of another day), not time passing.
    """
    if now_epoch_s <= prev_epoch_s or now_epoch_s - prev_epoch_s >= 86400.0:
        return False
    start = solar_hour(prev_epoch_s, longitude_deg)
    span_h = (now_epoch_s - prev_epoch_s) / 3600.0
    return 0.0 < (at_solar_h - start) % 24.0 <= span_h


class Damager:
    """Applies line faults to the replies of one device, reproducibly from a seed.

    :meth:`apply` returns the chunks to write and how long to hold them back [s].
    ``pending`` holds one-shot line faults (from scheduled events) for the next reply.
    Random draws are made in a fixed order for every reply, so a given seed and
    sequence of replies always gives the same damage.
    """

    def __init__(self, faults: LineFaults | None, seed: int,
                 late_reply_s: float = DEFAULT_LATE_REPLY_S) -> None:
        self.faults = faults or LineFaults()
        self.rng = random.Random(seed)
        self.late_reply_s = late_reply_s
        self.previous: bytes | None = None
        self.pending: set[str] = set()
        self.counts: dict[str, int] = {k: 0 for k in LINE_EVENT_KINDS}

    def garbage(self) -> bytes:
        """A run of garbage bytes ended by CR LF: printable noise with some binary."""
        rng = self.rng
        n = rng.randrange(1, 40)
        out = bytearray()
        for _ in range(n):
            out.append(rng.randrange(0x20, 0x7F) if rng.random() < 0.8 else rng.randrange(0x80,
                                                                                          0x100))
        return bytes(out) + b"\r\n"

    def apply(self, reply: bytes) -> tuple[list[bytes], float]:
        f, rng = self.faults, self.rng
        previous, self.previous = self.previous, reply
        once, self.pending = self.pending, set()
        if not f.any and not once:
            return [reply], 0.0
        # Draw every number every time, so one fault does not shift the others' draws.
        draws = [rng.random() for _ in range(6)]
        out: list[bytes] = []
        delay_s = 0.0
        if previous is not None and (draws[0] < f.stale or "stale" in once):
            out.append(previous)
            self.counts["stale"] += 1
        if draws[1] < f.garble or "garbage" in once:
            out.append(self.garbage())
            self.counts["garbage"] += 1
        if draws[2] < f.late or "late" in once:
            delay_s = self.late_reply_s
            self.counts["late"] += 1
        if draws[3] < f.drop or "drop" in once:
            self.counts["drop"] += 1
            return out, delay_s
        if draws[4] < f.truncate or "truncate" in once:
            # max(): a reply of a few bytes (a text command's "1") still loses some.
            reply = reply[: rng.randrange(1, max(2, len(reply) - 2))] + b"\r\n"
            self.counts["truncate"] += 1
        elif draws[5] < f.corrupt or "corrupt" in once:
            body = bytearray(reply)
            # Flip a bit of a printable character before the line end; the result may
            # leave ASCII, as line noise does.
            i = rng.randrange(0, max(1, len(reply) - 2))
            body[i] ^= 1 << rng.randrange(0, 7)
            if body[i] in (0x0A, 0x0D):
                body[i] ^= 0x40
            reply = bytes(body)
            self.counts["corrupt"] += 1
        out.append(reply)
        return out, delay_s
