"""Output folders that appear only when complete, and that two runs never share.

A run takes a lock next to the folder it was asked for (``.NAME.lock``, created exclusively), writes into
a hidden sibling (``.NAME.partial-HOST-PID``) and renames it to ``NAME`` on success; so an interrupted or
failed run never leaves a folder that looks complete, and of two runs into the same folder the second
stops with an :class:`~pipeline.errors.OutputError` before writing anything.  An existing folder is never
replaced without ``overwrite=True``.  Locks and partial folders left by dead processes of this host are
removed by the next run; those of other hosts (a decode spread over several machines sharing storage) are
left alone, since their owner cannot be checked from here.
"""

from __future__ import annotations

import os
import re
import shutil
import socket
from pathlib import Path

from pipeline.errors import OutputError

__all__ = ["INCOMPLETE", "OutputFolder"]

#: The marker file of a live output folder that is still being written.
INCOMPLETE = "INCOMPLETE"

_PARTIAL = re.compile(r"^\.(?P<name>.+)\.partial-(?P<host>[A-Za-z0-9_.-]+)-(?P<pid>\d+)$")


def _host() -> str:
    """This machine's name, reduced to characters safe in a file name."""
    return re.sub(r"[^A-Za-z0-9_.-]", "_", socket.gethostname() or "host")[:64] or "host"


def _alive(pid: int) -> bool:
    """Whether process ``pid`` of this host exists (a process of another user counts as alive)."""
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _remove_stale(parent: Path, host: str) -> list[Path]:
    """Remove partial folders in ``parent`` left by dead processes of this host; returns what was removed."""
    removed = []
    try:
        entries = list(parent.iterdir())
    except OSError:
        return removed
    for entry in entries:
        m = _PARTIAL.match(entry.name)
        if m and m["host"] == host and not _alive(int(m["pid"])):
            shutil.rmtree(entry, ignore_errors=True)
            removed.append(entry)
    return removed


class OutputFolder:
    """Context manager yielding a temporary folder that becomes ``path`` on a clean exit.

    Parameters
    ----------
    path : str or Path
        The folder the caller asked for.
    overwrite : bool, keyword-only
        Replace ``path`` if it exists.  Without it an existing ``path`` raises
        :class:`~pipeline.errors.OutputError` before anything is written, and is left untouched.
    live : bool, keyword-only
        Write straight into ``path`` (a live decode, ``--follow``: readers see the records as they come)
        with a file :data:`INCOMPLETE` in it while the run lasts; a clean exit removes the marker, a
        failure or a killed process leaves it.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> with tempfile.TemporaryDirectory() as d:
    ...     with OutputFolder(pathlib.Path(d) / "out") as tmp:
    ...         _ = (tmp / "a.txt").write_text("done")
    ...     sorted(p.name for p in pathlib.Path(d).iterdir())
    ['out']
    """

    def __init__(self, path: str | os.PathLike, *, overwrite: bool = False, live: bool = False):
        self.path = Path(path)
        self.overwrite = bool(overwrite)
        self.live = bool(live)
        self._check_target()
        parent = self.path.parent
        if not parent.exists():
            try:
                parent.mkdir(parents=True, exist_ok=True)
            except OSError as exc:
                raise OutputError(f"{parent}: cannot create output folder ({exc.strerror})") from None
        self.host = _host()
        self.tmp = parent / f".{self.path.name}.partial-{self.host}-{os.getpid()}"
        self.lock = parent / f".{self.path.name}.lock"
        self._locked = False

    def _check_target(self) -> None:
        if self.path.exists() and not self.overwrite:
            raise OutputError(f"{self.path}: output folder exists; use --overwrite to replace it")
        if self.path.exists() and not self.path.is_dir():
            raise OutputError(f"{self.path}: exists and is not a folder")

    def __enter__(self) -> Path:
        _remove_stale(self.path.parent, self.host)
        self._acquire()
        try:
            self._check_target()  # another run may have finished this folder while we waited for nothing
            if self.live:
                if self.path.exists():
                    shutil.rmtree(self.path)  # only with overwrite (checked above)
                self.path.mkdir()
                (self.path / INCOMPLETE).write_text(f"being written by process {os.getpid()} on {self.host}\n")
                return self.path
            if self.tmp.exists():
                shutil.rmtree(self.tmp)
            self.tmp.mkdir()
        except OSError as exc:
            self._release()
            raise OutputError(f"{self.tmp.parent}: cannot write output ({exc.strerror})") from None
        except BaseException:
            self._release()
            raise
        return self.tmp

    def __exit__(self, exc_type, exc, tb) -> bool:
        try:
            if self.live:
                if exc_type is None:
                    (self.path / INCOMPLETE).unlink(missing_ok=True)
                return False  # a failed live run keeps what it wrote, marked INCOMPLETE
            if exc_type is not None:
                shutil.rmtree(self.tmp, ignore_errors=True)
                return False
            try:
                self._publish()
            except BaseException:
                shutil.rmtree(self.tmp, ignore_errors=True)
                raise
        finally:
            self._release()
        return False

    # ---- internals ------------------------------------------------------------------------
    def _publish(self) -> None:
        old = None
        if self.path.exists():
            if not self.overwrite:
                raise OutputError(f"{self.path}: output folder appeared during the run; nothing was replaced")
            old = self.path.parent / f".{self.path.name}.old-{self.host}-{os.getpid()}"
            os.replace(self.path, old)
        try:
            os.replace(self.tmp, self.path)
        except OSError as exc:
            raise OutputError(f"{self.path}: cannot publish the output ({exc.strerror})") from None
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)

    def _acquire(self) -> None:
        for _ in range(2):
            try:
                fd = os.open(self.lock, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                host, pid = self._owner()
                if host == self.host and not _alive(pid):
                    self.lock.unlink(missing_ok=True)  # left by a dead run of this host
                    continue
                where = f"process {pid} on {host}" if pid else "another run"
                raise OutputError(f"{self.path}: {where} is writing this output folder (lock {self.lock.name}); "
                                  f"wait for it, or remove the lock if that run is gone") from None
            except OSError as exc:
                raise OutputError(f"{self.path.parent}: cannot write output ({exc.strerror})") from None
            with os.fdopen(fd, "w", encoding="utf-8") as f:
                f.write(f"{self.host} {os.getpid()}\n")
            self._locked = True
            return
        raise OutputError(f"{self.path}: cannot take the lock {self.lock.name}")  # pragma: no cover - a race

    def _owner(self) -> tuple[str, int]:
        try:
            host, pid = self.lock.read_text(encoding="utf-8").split()
            return host, int(pid)
        except (OSError, ValueError):
            return "", 0

    def _release(self) -> None:
        if self._locked:
            self.lock.unlink(missing_ok=True)
            self._locked = False
