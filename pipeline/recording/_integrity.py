"""Integrity of a SigMF dataset: its SHA-512 (``core:sha512``) checked from the octets as they are read."""

from __future__ import annotations

import hashlib
import os
import queue
import threading
from concurrent.futures import Future
from pathlib import Path

from pipeline.errors import RecordingError

__all__ = ["DatasetChecksum", "CHECKSUM_FLAG", "BackgroundFeed"]

#: The command-line flag that skips the check (named in the mismatch message).
CHECKSUM_FLAG = "--no-checksum"


class DatasetChecksum:
    """SHA-512 of one SigMF dataset, fed in file order and compared with ``core:sha512`` at the end.

    Build it with :meth:`Recording.checksum`.  Either feed it yourself (:meth:`update` with the
    dataset's octets in order, then :meth:`finish`), or let it read the file itself
    (:meth:`verify_file`, or :meth:`verify_in_background` in a thread of its own while worker
    processes decode the recording out of order).

    Parameters
    ----------
    path : path-like
        File holding the dataset (the ``.sigmf-data``, or the archive).
    expected : str
        ``core:sha512``, 128 hexadecimal digits.
    offset_bytes, size_bytes : int
        Where the dataset lies in ``path``: the whole data file of a pair, the data member of an
        archive.  Header and trailing octets of a Non-Conforming Dataset are part of it.
    meta_name : str
        The metadata file's name, for the message.

    Attributes
    ----------
    bytes_done : int
        Octets hashed so far.
    ok : bool or None
        None until :meth:`finish`, then True (a mismatch raises).

    Notes
    -----
    SigMF: ``core:sha512`` is "the SHA512 hash of the Dataset file associated with the SigMF
    file"; the ``sigmf`` library hashes the whole data file of a pair and the data member of an
    archive, and so does this class.  Cost: one SHA-512 pass (about 0.7 GB/s on one core of the
    development machine); :func:`hashlib` releases the GIL on large buffers, so a thread running
    :meth:`verify_file` overlaps with the decode.  Memory: one block of ``block_bytes``.

    References
    ----------
    SigMF specification 1.2.6, global object, ``core:sha512``; FIPS 180-4 (SHA-512).

    Examples
    --------
    >>> import hashlib, tempfile, os
    >>> with tempfile.TemporaryDirectory() as d:
    ...     p = os.path.join(d, "x.sigmf-data")
    ...     _ = open(p, "wb").write(b"tamarisk" * 1000)
    ...     check = DatasetChecksum(path=p, expected=hashlib.sha512(b"tamarisk" * 1000).hexdigest(),
    ...                             size_bytes=8000)
    ...     check.verify_file()
    True
    """

    def __init__(self, *, path, expected: str, offset_bytes: int = 0, size_bytes: int, meta_name: str = "") -> None:
        if not isinstance(expected, str) or len(expected) != 128:
            raise ValueError(f"Argument 'expected' must be 128 hexadecimal digits, not {expected!r}.")
        for name, v in (("offset_bytes", offset_bytes), ("size_bytes", size_bytes)):
            if isinstance(v, bool) or not isinstance(v, int) or v < 0:
                raise ValueError(f"Argument '{name}' must be a non-negative integer, not {v!r}.")
        self.path = Path(os.fspath(path))
        self.expected = expected.lower()
        self.offset_bytes = offset_bytes
        self.size_bytes = size_bytes
        self.meta_name = meta_name
        self.bytes_done = 0
        self.ok: bool | None = None
        self._hash = hashlib.sha512()
        self._cancel = threading.Event()

    def __repr__(self) -> str:
        return f"DatasetChecksum({str(self.path)!r}, {self.bytes_done}/{self.size_bytes} bytes, ok={self.ok})"

    def update(self, data) -> None:
        """Hash the next octets of the dataset (any C-contiguous buffer: bytes, memoryview, ndarray)."""
        n = memoryview(data).nbytes
        if self.bytes_done + n > self.size_bytes:
            raise ValueError(f"Argument 'data' runs past the end of the {self.size_bytes}-byte dataset "
                             f"({self.bytes_done} + {n} bytes).")
        self._hash.update(data)
        self.bytes_done += n

    def finish(self) -> None:
        """Compare the digest of every octet with ``core:sha512``.

        Raises
        ------
        RecordingError
            One line when the digests differ: the data file changed or is damaged.
        ValueError
            When not every octet of the dataset was fed (a caller's mistake).
        """
        if self.bytes_done != self.size_bytes:
            raise ValueError(f"Argument 'data' covered {self.bytes_done} of the {self.size_bytes} bytes of the "
                             f"dataset; the checksum needs them all.")
        if self._hash.hexdigest() != self.expected:
            self.ok = False
            about = f" in {self.meta_name}" if self.meta_name else ""
            raise RecordingError(f"{self.path}: content does not match core:sha512{about} (the data file changed or "
                                 f"is damaged); nothing decoded from it is complete ({CHECKSUM_FLAG} skips the check)")
        self.ok = True

    def verify_file(self, *, block_bytes: int = 1 << 22) -> bool:
        """Read the dataset from ``path`` in order, hash it and :meth:`finish`.

        Returns
        -------
        bool
            True when verified; False when :meth:`cancel` was called first (nothing is concluded).

        Raises
        ------
        RecordingError
            Mismatch, or the file can no longer be read or became shorter.
        """
        if isinstance(block_bytes, bool) or not isinstance(block_bytes, int) or block_bytes < 1:
            raise ValueError(f"Argument 'block_bytes' must be a positive integer, not {block_bytes!r}.")
        if self.bytes_done:
            raise ValueError("Argument 'self' has been fed already: verify_file() reads the whole dataset itself.")
        buf = bytearray(min(block_bytes, max(self.size_bytes, 1)))
        view = memoryview(buf)
        try:
            with open(self.path, "rb", buffering=0) as fh:
                fh.seek(self.offset_bytes)
                while self.bytes_done < self.size_bytes:
                    if self._cancel.is_set():
                        return False
                    want = min(len(buf), self.size_bytes - self.bytes_done)
                    got = fh.readinto(view[:want])
                    if not got:
                        raise RecordingError(f"{self.path}: ends after {self.offset_bytes + self.bytes_done} bytes "
                                             f"while its checksum was read; it changed during the decode")
                    self.update(view[:got])
        except OSError as exc:
            raise RecordingError(f"{self.path}: cannot read ({exc.strerror})") from None
        self.finish()
        return True

    def verify_in_background(self, *, block_bytes: int = 1 << 22) -> Future:
        """Run :meth:`verify_file` in a new daemon thread; the returned future holds its outcome.

        ``future.result()`` returns True (verified) or False (cancelled), or raises the
        :class:`RecordingError` of a mismatch.  Call :meth:`cancel` to stop it early (for example
        when the decode fails); it stops within one block.
        """
        fut: Future = Future()
        fut.set_running_or_notify_cancel()

        def run() -> None:
            try:
                fut.set_result(self.verify_file(block_bytes=block_bytes))
            except BaseException as exc:  # handed to the caller through the future
                fut.set_exception(exc)

        threading.Thread(target=run, name="sha512-check", daemon=True).start()
        return fut

    def cancel(self) -> None:
        """Make a running :meth:`verify_file` return False at its next block."""
        self._cancel.set()


class BackgroundFeed:
    """Feeds a :class:`DatasetChecksum` from a thread of its own, in the order the buffers are put.

    Used by :meth:`Recording.chunks`: the SHA-512 of one chunk runs while the caller decodes
    the next (:func:`hashlib` releases the GIL), instead of adding its time to the decode.  At
    most ``depth`` buffers wait (each keeps its chunk's read-only map alive), so memory stays
    bounded.

    Parameters
    ----------
    check : DatasetChecksum
    depth : int
        Buffers that may wait; :meth:`put` blocks beyond that.
    """

    def __init__(self, check: DatasetChecksum, *, depth: int = 2) -> None:
        self.check = check
        self._queue: queue.Queue = queue.Queue(maxsize=depth)
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._run, name="sha512-feed", daemon=True)
        self._thread.start()

    def _run(self) -> None:
        while True:
            buf = self._queue.get()
            if buf is None:
                return
            if self._error is None:
                try:
                    self.check.update(buf)
                except BaseException as exc:  # re-raised on the caller's thread by put() or join()
                    self._error = exc
            del buf

    def put(self, data) -> None:
        """Queue the next octets (kept alive until hashed)."""
        if self._error is not None:
            raise self._error
        self._queue.put(data)

    def join(self) -> None:
        """Wait until every queued buffer is hashed and stop the thread; re-raise its error, if any."""
        if self._thread.is_alive():
            self._queue.put(None)
            self._thread.join()
        if self._error is not None:
            raise self._error
