"""One writer per run folder: the lock ``kinecast fit`` holds while it writes a run.

The lock is a small TOML file, :data:`LOCK_FILE`, in the run folder::

    pid = 4242
    host = "lab-pc"
    started = "2026-12-03T09:15:02+00:00"

It is created with ``O_CREAT | O_EXCL`` (POSIX ``open(2)``: the call fails if the name exists, and the
check and the creation are one atomic step), so of two fits started at once on one folder exactly one
gets it; the other is refused with one line naming the folder and the holder's process and host.
This one file is written in place, not through :mod:`kinecast.fileio`: creating it under its own name
*is* the lock.

A lock whose process is gone (killed: SIGKILL runs no clean-up) is stale. On the same host that is
known for sure (see :func:`process_alive`), and the next fit takes it over, saying so in one line. A
lock taken on another host (a shared network folder) cannot be checked from here and is respected.
"""

from __future__ import annotations

import contextlib
import json
import os
import socket
import sys
import time
from dataclasses import dataclass
from pathlib import Path

from ..errors import KinecastError

try:
    import tomllib
except ModuleNotFoundError:  # Python < 3.11
    import tomli as tomllib  # type: ignore[no-redef]

from ..runfolder import LOCK as LOCK_FILE
# Tries at taking the lock when a stale one is cleared in between: each failed try means another
# process took or cleared it meanwhile, which ends after one or two rounds; the bound only stops a loop
TAKE_TRIES = 5


@dataclass(frozen=True)
class Holder:
    """Who holds a run folder's lock, as its lock file says."""

    pid: int
    host: str
    started: str
    text: str  # the file's exact text (a takeover checks that it moved this very file)

    def describe(self) -> str:
        return f"process {self.pid} on host {self.host}, since {self.started}"

    def alive(self) -> bool:
        """False only when the holder is known to be gone: same host and no such process."""
        return self.host != socket.gethostname() or process_alive(self.pid)


def process_alive(pid: int) -> bool:
    """Whether process ``pid`` exists on this host (and is not a zombie waiting to be reaped).

    POSIX kill(2) with signal 0: "error checking is still performed" but no signal is sent; it fails
    with ESRCH (ProcessLookupError) when there is no such process, and with EPERM (PermissionError)
    when the process exists but belongs to another user, which is alive all the same.
    """
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return not _zombie(pid)


def _zombie(pid: int) -> bool:
    """A process that has ended but not been reaped by its parent still answers kill(2); Linux's
    /proc/PID/stat (proc(5)) shows its state as ``Z``. False where there is no /proc."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return False
    return stat[stat.rfind(")") + 1:].split()[:1] == ["Z"]  # the state follows "(command name)"


def read_holder(path: Path) -> Holder | None:
    """The holder named in lock file ``path``; None when there is no such file.

    Raises KinecastError when the file is there but does not name a process (half written, or not ours).
    """
    try:
        text = path.read_text(encoding="utf-8")
    except (FileNotFoundError, NotADirectoryError):  # no file, or the run folder cannot exist here
        return None
    except (OSError, UnicodeDecodeError) as exc:
        raise _unreadable(path, str(exc)) from None
    try:
        data = tomllib.loads(text)
        pid, host, started = data["pid"], data["host"], data["started"]
    except (tomllib.TOMLDecodeError, KeyError) as exc:
        raise _unreadable(path, f"no {exc}" if isinstance(exc, KeyError) else "not TOML") from None
    if not (isinstance(pid, int) and pid > 0 and isinstance(host, str)):
        raise _unreadable(path, "no valid pid and host")
    return Holder(pid, host, str(started), text)


def _unreadable(path: Path, why: str) -> KinecastError:
    return KinecastError(path.parent, f"its lock file {path.name} does not name a process ({why}); a fit "
                                      f"may be starting there: if none is, delete {path}")


class RunLock:
    """The lock of one run folder, held while ``kinecast fit`` writes it.

    ``with RunLock(run):`` takes the lock (creating the folder if needed) and releases it however the
    block ends. With ``defer=True`` the block only promises the release; the caller takes the lock
    with :meth:`take` once it has checked the folder (so that a refused command creates nothing).
    Releasing removes the lock file, and the folders :meth:`take` created if they are still empty.

    Examples
    --------
    >>> with RunLock("runs/pendulum"):  # doctest: +SKIP
    ...     write_the_run()
    """

    def __init__(self, run: str | Path, defer: bool = False):
        self.run = Path(run)
        self.path = self.run / LOCK_FILE
        self.defer = defer
        self.held = False
        self._text = ""
        self._made: list[Path] = []  # folders take() created, deepest first

    def __enter__(self) -> RunLock:
        if not self.defer:
            self.take()
        return self

    def __exit__(self, *exc) -> None:
        self.release()

    def refuse_if_held(self) -> None:
        """Raise the one-line refusal when another live process holds the lock; nothing is written."""
        if self.held:
            return
        holder = read_holder(self.path)
        if holder is not None and holder.alive():
            raise self._busy(holder)

    def take(self) -> RunLock:
        """Take the lock: create the lock file atomically, taking over a stale one; refuse a live one."""
        if self.held:
            return self
        self._make_folder()
        for _ in range(TAKE_TRIES):
            try:
                fd = os.open(self.path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
            except FileExistsError:
                holder = read_holder(self.path)
                if holder is not None and holder.alive():
                    raise self._busy(holder) from None
                if holder is not None and self._clear_stale(holder):
                    print(f"kinecast: {self.run}: the fit that held this folder ({holder.describe()}) is no "
                          "longer running; taking over its lock", file=sys.stderr, flush=True)
                continue
            except OSError as exc:
                raise KinecastError(self.path, f"cannot create the lock file ({exc.strerror or exc})"
                                    ) from None
            self._write(fd)
            return self
        raise KinecastError(self.run, f"could not take the lock {LOCK_FILE}: other processes keep taking "
                                      "and clearing it; try again")

    def release(self) -> None:
        """Remove the lock file if it is still ours, then the folders :meth:`take` made, if empty."""
        if self.held:
            self.held = False
            with contextlib.suppress(OSError):
                if self.path.read_text(encoding="utf-8") == self._text:
                    self.path.unlink()
        for folder in self._made:
            with contextlib.suppress(OSError):  # not empty: the run was written
                folder.rmdir()
        self._made = []

    def _make_folder(self) -> None:
        missing = []
        probe = self.run
        while not probe.exists() and probe != probe.parent:
            missing.append(probe)
            probe = probe.parent
        try:
            self.run.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise KinecastError(self.run, f"cannot create the run folder ({exc.strerror or exc})") from None
        self._made = missing

    def _write(self, fd: int) -> None:
        started = time.strftime("%Y-%m-%dT%H:%M:%S+00:00", time.gmtime())
        self._text = (f"# kinecast fit is writing this run folder; removed when it ends\n"
                      f"pid = {os.getpid()}\nhost = {json.dumps(socket.gethostname())}\n"
                      f'started = "{started}"\n')
        try:
            os.write(fd, self._text.encode("utf-8"))
            os.fsync(fd)
        except OSError as exc:  # a disk full: leave no half-written lock behind
            self.path.unlink(missing_ok=True)
            raise KinecastError(self.path, f"cannot write the lock file ({exc.strerror or exc})") from None
        finally:
            os.close(fd)
        self.held = True

    def _clear_stale(self, holder: Holder) -> bool:
        """Remove the stale lock ``holder`` wrote; False when another process got there first.

        It is moved aside (POSIX rename(2) is atomic: of two processes clearing it, one moves it) and
        checked: if what was moved is a fresh lock another process took meanwhile, it is put back
        with link(2), which, like O_EXCL, never replaces a file.
        """
        aside = self.path.with_name(f".{LOCK_FILE}.{os.getpid()}.stale")
        try:
            os.replace(self.path, aside)
        except FileNotFoundError:
            return False
        try:
            if aside.read_text(encoding="utf-8") == holder.text:
                return True
            with contextlib.suppress(FileExistsError):
                os.link(aside, self.path)
            return False
        finally:
            aside.unlink(missing_ok=True)

    def _busy(self, holder: Holder) -> KinecastError:
        return KinecastError(self.run, f"another kinecast fit is writing this run folder "
                                       f"({holder.describe()}); wait for it to end, or, if that process "
                                       f"is not a kinecast fit, delete {self.path}")
