"""A FUSE file system that forgets what was never fsynced: the power-loss test's disk.

    python -m tests.powercut_fs BACKING MOUNTPOINT [--cap-bytes N]

The files live in the directory BACKING, which plays the disk's platters. A write
lands in this process's memory (every read sees it at once, as from a page cache) and
reaches the backing file only when the file is fsynced. On the word ``cut`` on
standard input (or, after ``arm OP SUFFIX COUNT [SEED]``, at the COUNT-th ``write`` or
``fsync`` of a file whose name ends in SUFFIX, before it does anything: a cut inside a
WAL append or its sync), the power goes: every write not yet fsynced is dropped (``cut torn
SEED`` instead keeps a random half of its 512-byte sectors, as a disk that wrote some
of its cache on its own), every later operation fails with EIO, and the process
answers ``cut N`` with the number of sectors it dropped. Unmount it then
(``fusermount3 -u MOUNTPOINT``); mounting BACKING again is the power coming back.

Metadata (create, rename, unlink, mkdir) reaches the backing directory at once, as on a
journalling file system that commits its metadata first; only file contents are held
back. That is kinder than some disks and harsher than most; see README "At power loss".
``--cap-bytes`` makes the file system full beyond that many bytes of file data (ENOSPC).

The process prints ``mounted`` once the mount answers. It is the same kind of tool as
device-mapper's flakey and log-writes targets, which this machine does not have.
"""

from __future__ import annotations

import argparse
import errno
import os
import queue
import random
import shutil
import subprocess
import sys
import threading
import time
from contextlib import suppress
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO

try:
    import mfusepy as fuse
except (ImportError, OSError) as exc:  # OSError: mfusepy found no libfuse
    fuse = None
    FUSE_MISSING = f"mfusepy cannot load libfuse ({exc}); apt-get install fuse3"
else:
    FUSE_MISSING = ""

SECTOR = 512


@dataclass
class _File:
    """One file's contents as the programs see them, and what is not yet on the disk."""

    backing: Path | None  # None once unlinked
    data: bytearray
    pending: list[tuple[str, int, bytes]] = field(default_factory=list)  # (op, offset, data)
    opens: int = 0


class PowercutFS(fuse.Operations if fuse else object):
    """Pass-through to a backing directory that holds file data back until fsync."""

    use_ns = True

    def __init__(self, backing: Path, cap_bytes: int | None = None):
        self.root = backing
        self.cap = cap_bytes
        self.files: dict[str, _File] = {}
        self.handles: dict[int, _File] = {}
        self.next_fh = 1
        self.mutex = threading.RLock()
        self.power = True
        # An armed cut: (operation, file-name suffix, operations left, torn seed).
        self.armed: tuple[str, str, int, int | None] | None = None
        self.say = print
        self.synced_sectors = 0

    # ----------------------------------------------------------------- helpers

    def _path(self, path: str) -> Path:
        return self.root / path.lstrip("/")

    def _alive(self) -> None:
        if not self.power:
            raise fuse.FuseOSError(errno.EIO)

    def _file(self, path: str) -> _File:
        f = self.files.get(path)
        if f is None:
            p = self._path(path)
            f = _File(p, bytearray(p.read_bytes()))
            self.files[path] = f
        return f

    def _used(self) -> int:
        return sum(len(f.data) for f in self.files.values())

    def _new_handle(self, f: _File) -> int:
        fh = self.next_fh
        self.next_fh += 1
        self.handles[fh] = f
        f.opens += 1
        return fh

    def cut(self, torn_seed: int | None = None) -> int:
        """Power off: drop (or tear) every write not yet fsynced; return sectors dropped."""
        with self.mutex:
            rng = random.Random(torn_seed)
            dropped = 0
            every = {id(f): f for f in [*self.files.values(), *self.handles.values()]}
            for f in every.values():
                for op, offset, data in f.pending:
                    if op == "write":
                        for start in range(0, len(data), SECTOR):
                            chunk = data[start:start + SECTOR]
                            if torn_seed is not None and f.backing is not None \
                                    and rng.random() < 0.5:
                                self._to_disk(f.backing, [(op, offset + start, chunk)])
                            else:
                                dropped += 1
                f.pending.clear()
            self.power = False
            self.files.clear()
            return dropped

    @staticmethod
    def _to_disk(path: Path, ops: list[tuple[str, int, bytes]]) -> None:
        fd = os.open(path, os.O_WRONLY)
        try:
            for op, offset, data in ops:
                if op == "write":
                    os.pwrite(fd, data, offset)
                else:
                    os.ftruncate(fd, offset)
            os.fsync(fd)
        finally:
            os.close(fd)

    # ----------------------------------------------------------------- metadata

    def getattr(self, path, fh=None):
        with self.mutex:
            self._alive()
            try:
                st = os.lstat(self._path(path))
            except FileNotFoundError:
                raise fuse.FuseOSError(errno.ENOENT) from None
            attrs = {k: getattr(st, k) for k in (
                "st_mode", "st_nlink", "st_uid", "st_gid", "st_size", "st_atime_ns",
                "st_mtime_ns", "st_ctime_ns")}
            attrs["st_atime"], attrs["st_mtime"], attrs["st_ctime"] = (
                attrs.pop("st_atime_ns"), attrs.pop("st_mtime_ns"), attrs.pop("st_ctime_ns"))
            f = self.handles.get(fh) if fh else self.files.get(path)
            if f is not None:
                attrs["st_size"] = len(f.data)
            return attrs

    def readdir(self, path, fh):
        with self.mutex:
            self._alive()
            return [".", "..", *os.listdir(self._path(path))]

    def statfs(self, path):
        with self.mutex:
            self._alive()
            st = os.statvfs(self.root)
            out = {k: getattr(st, k) for k in (
                "f_bsize", "f_frsize", "f_blocks", "f_bfree", "f_bavail", "f_files",
                "f_ffree", "f_favail", "f_namemax")}
            if self.cap is not None:
                out["f_blocks"] = self.cap // out["f_frsize"]
                free = max(0, self.cap - self._used()) // out["f_frsize"]
                out["f_bfree"] = out["f_bavail"] = free
            return out

    def mkdir(self, path, mode):
        with self.mutex:
            self._alive()
            os.mkdir(self._path(path), mode)
            return 0

    def rmdir(self, path):
        with self.mutex:
            self._alive()
            os.rmdir(self._path(path))
            return 0

    def chmod(self, path, mode):
        with self.mutex:
            self._alive()
            os.chmod(self._path(path), mode)
            return 0

    def chown(self, path, uid, gid):
        with self.mutex:
            self._alive()
            os.chown(self._path(path), uid, gid)
            return 0

    def utimens(self, path, times=None):
        with self.mutex:
            self._alive()
            os.utime(self._path(path), ns=times)
            return 0

    def access(self, path, amode):
        with self.mutex:
            self._alive()
            if not os.access(self._path(path), amode):
                raise fuse.FuseOSError(errno.EACCES)
            return 0

    def unlink(self, path):
        with self.mutex:
            self._alive()
            os.unlink(self._path(path))
            f = self.files.pop(path, None)
            if f is not None:
                f.backing = None
                f.pending.clear()
            return 0

    def rename(self, old, new):
        with self.mutex:
            self._alive()
            os.rename(self._path(old), self._path(new))
            gone = self.files.pop(new, None)
            if gone is not None:
                gone.backing = None
            f = self.files.pop(old, None)
            if f is not None:
                f.backing = self._path(new)
                self.files[new] = f
            return 0

    # ----------------------------------------------------------------- contents

    def create(self, path, mode, fi=None):
        with self.mutex:
            self._alive()
            fd = os.open(self._path(path), os.O_WRONLY | os.O_CREAT, mode)
            os.close(fd)
            return self._new_handle(self._file(path))

    def open(self, path, flags):
        with self.mutex:
            self._alive()
            try:
                f = self._file(path)
            except FileNotFoundError:
                raise fuse.FuseOSError(errno.ENOENT) from None
            if flags & os.O_TRUNC:
                self._truncate(f, 0)
            return self._new_handle(f)

    def read(self, path, size, offset, fh):
        with self.mutex:
            self._alive()
            f = self.handles[fh]
            return bytes(f.data[offset:offset + size])

    def arm(self, op: str, suffix: str, count: int, torn_seed: int | None) -> None:
        """Cut the power at the ``count``-th ``op`` ('write' or 'fsync') on a file whose
        name ends in ``suffix``, before that operation does anything."""
        with self.mutex:
            self.armed = (op, suffix, count, torn_seed)

    def _trip(self, op: str, path: str) -> None:
        if self.armed is None or self.armed[0] != op or not path.endswith(self.armed[1]):
            return
        _, suffix, left, seed = self.armed
        self.armed = (op, suffix, left - 1, seed) if left > 1 else None
        if left == 1:
            self.say(f"cut {self.cut(seed)} at {op} {path}", flush=True)
            raise fuse.FuseOSError(errno.EIO)

    def write(self, path, data, offset, fh):
        with self.mutex:
            self._alive()
            self._trip("write", path)
            f = self.handles[fh]
            grow = max(0, offset + len(data) - len(f.data))
            if self.cap is not None and grow and self._used() + grow > self.cap:
                raise fuse.FuseOSError(errno.ENOSPC)
            if len(f.data) < offset:
                f.data.extend(bytes(offset - len(f.data)))
            f.data[offset:offset + len(data)] = data
            f.pending.append(("write", offset, bytes(data)))
            return len(data)

    def _truncate(self, f: _File, length: int) -> None:
        if length < len(f.data):
            del f.data[length:]
        else:
            f.data.extend(bytes(length - len(f.data)))
        f.pending.append(("truncate", length, b""))

    def truncate(self, path, length, fh=None):
        with self.mutex:
            self._alive()
            f = self.handles[fh] if fh else self._file(path)
            self._truncate(f, length)
            return 0

    def fsync(self, path, datasync, fh):
        with self.mutex:
            self._alive()
            self._trip("fsync", path)
            f = self.handles[fh]
            if f.pending and f.backing is not None:
                self._to_disk(f.backing, f.pending)
                self.synced_sectors += sum(-(-len(d) // SECTOR) for _, _, d in f.pending)
            f.pending.clear()
            return 0

    def fsyncdir(self, path, datasync, fh):
        with self.mutex:
            self._alive()  # metadata is on the disk already
            return 0

    def flush(self, path, fh):
        with self.mutex:
            self._alive()  # close() is not fsync(): nothing reaches the disk here
            return 0

    def release(self, path, fh):
        with self.mutex:
            f = self.handles.pop(fh, None)
            if f is not None:
                f.opens -= 1
            return 0


def _control(fs: PowercutFS) -> None:
    for line in sys.stdin:
        words = line.split()
        if words[:1] == ["cut"]:
            seed = int(words[2]) if words[1:2] == ["torn"] else None
            print(f"cut {fs.cut(seed)}", flush=True)
        elif words[:1] == ["arm"]:  # arm OP SUFFIX COUNT [SEED]
            fs.arm(words[1], words[2], int(words[3]),
                   int(words[4]) if len(words) > 4 else None)
            print("armed", flush=True)
        elif words[:1] == ["synced"]:
            print(f"synced {fs.synced_sectors}", flush=True)


def _announce(mountpoint: Path) -> None:
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        if os.path.ismount(mountpoint):
            print("mounted", flush=True)
            return
        time.sleep(0.05)
    print("not mounted after 30 s", flush=True)


def why_not_mountable() -> str:
    """Why this machine cannot mount the file system ('' when it can, as far as we know
    without trying)."""
    if FUSE_MISSING:
        return FUSE_MISSING
    if not os.path.exists("/dev/fuse"):
        return "no /dev/fuse on this machine (a container without the FUSE device)"
    if shutil.which("fusermount3") is None:
        return "fusermount3 is missing; apt-get install fuse3"
    return ""


GUARD_S = 120.0


def _pump(stream: IO[str], lines: queue.Queue) -> None:
    for line in stream:
        lines.put(line.strip())
    lines.put("")  # the process ended


class Disk:
    """The test's handle on one mount of the file system over ``backing``.

    ``Disk(backing, mountpoint).mount()`` starts the process and waits for the mount;
    :meth:`cut` is the power going, :meth:`unmount` ends the process. Mount again
    (a new :class:`Disk` on the same backing) for the power coming back.
    """

    def __init__(self, backing: Path, mountpoint: Path, cap_bytes: int | None = None):
        self.backing, self.mountpoint, self.cap = backing, mountpoint, cap_bytes
        self.proc: subprocess.Popen | None = None
        self.log = mountpoint.parent / f"{mountpoint.name}.log"

    def mount(self) -> Disk:
        self.backing.mkdir(parents=True, exist_ok=True)
        self.mountpoint.mkdir(parents=True, exist_ok=True)
        cmd = [sys.executable, "-m", "tests.powercut_fs", str(self.backing),
               str(self.mountpoint)]
        if self.cap is not None:
            cmd += ["--cap-bytes", str(self.cap)]
        with self.log.open("a") as err:
            self.proc = subprocess.Popen(cmd, cwd=Path(__file__).resolve().parent.parent,
                                         stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                         stderr=err, text=True)
        self.lines: queue.Queue[str] = queue.Queue()
        self.pump = threading.Thread(target=_pump, args=(self.proc.stdout, self.lines),
                                     daemon=True)
        self.pump.start()
        line = self._line()
        if line != "mounted":
            self.unmount()
            err = self.log.read_text().strip().splitlines()
            raise OSError(f"the power-cut file system did not mount: "
                          f"{err[-1] if err else line or 'it exited'}")
        return self

    def ask(self, words: str) -> str:
        self.proc.stdin.write(words + "\n")
        self.proc.stdin.flush()
        return self._line()

    def cut(self, torn_seed: int | None = None) -> int:
        """Drop (or with ``torn_seed`` tear) what was not synced; return sectors dropped."""
        answer = self.ask("cut" if torn_seed is None else f"cut torn {torn_seed}")
        return int(answer.split()[1])

    def arm(self, op: str, suffix: str, count: int, torn_seed: int | None = None) -> None:
        """Cut the power at the ``count``-th ``op`` on a file ending in ``suffix``."""
        assert self.ask(f"arm {op} {suffix} {count}"
                        + ("" if torn_seed is None else f" {torn_seed}")) == "armed"

    def wait_cut(self) -> tuple[int, str]:
        """Wait for an armed cut to fire; (sectors dropped, where)."""
        words = self._line().split()
        assert words[:1] == ["cut"], words
        return int(words[1]), " ".join(words[3:])

    def _line(self) -> str:
        """The file system's next line. The guard only keeps a test whose file system
        stopped answering from stalling the suite; it measures nothing."""
        try:
            return self.lines.get(timeout=GUARD_S)
        except queue.Empty:
            raise AssertionError(f"the power-cut file system said nothing for {GUARD_S:g} s; "
                                 f"see {self.log}") from None

    def unmount(self) -> None:
        if self.proc is None:
            return
        if self.proc.poll() is None:
            # Not os.path.ismount: after a cut the mount point itself answers EIO.
            # Lazy: a file still open in the test process must not keep the old mount
            # (and its forgotten writes) alive.
            subprocess.run(["fusermount3", "-u", "-z", str(self.mountpoint)],
                           capture_output=True, check=False)
        with suppress(OSError):
            self.proc.stdin.close()
        try:
            self.proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        self.pump.join(timeout=GUARD_S)  # it ends at the process's end of output
        self.proc.stdout.close()

    def __enter__(self) -> Disk:
        return self if self.proc is not None else self.mount()

    def __exit__(self, *exc: object) -> None:
        self.unmount()


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("backing", type=Path)
    ap.add_argument("mountpoint", type=Path)
    ap.add_argument("--cap-bytes", type=int)
    args = ap.parse_args(argv)
    fs = PowercutFS(args.backing.resolve(), args.cap_bytes)
    threading.Thread(target=_control, args=(fs,), daemon=True).start()
    threading.Thread(target=_announce, args=(args.mountpoint,), daemon=True).start()
    fuse.FUSE(fs, str(args.mountpoint), foreground=True, nothreads=True,
              fsname="powercut", default_permissions=True)


if __name__ == "__main__":
    main()
