"""Output folders that appear only when complete.

A run writes into a hidden sibling folder and renames it to the requested name on success, so an
interrupted or failed run never leaves a folder that looks complete.  An existing folder is never
replaced without ``overwrite=True``.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

from pipeline.errors import OutputError

__all__ = ["OutputFolder"]


class OutputFolder:
    """Context manager yielding a temporary folder that becomes ``path`` on a clean exit.

    Parameters
    ----------
    path : str or Path
        The folder the caller asked for.
    overwrite : bool
        Replace ``path`` if it exists.  Without it an existing ``path`` raises
        :class:`~pipeline.errors.OutputError` before anything is written, and is left untouched.
    """

    def __init__(self, path: str | os.PathLike, *, overwrite: bool = False):
        self.path = Path(path)
        self.overwrite = bool(overwrite)
        if self.path.exists() and not self.overwrite:
            raise OutputError(f"{self.path}: output folder exists; use --overwrite to replace it")
        if self.path.exists() and not self.path.is_dir():
            raise OutputError(f"{self.path}: exists and is not a folder")
        parent = self.path.parent
        if not parent.exists():
            try:
                parent.mkdir(parents=True, exist_ok=True)
            except OSError as exc:
                raise OutputError(f"{parent}: cannot create output folder ({exc.strerror})") from None
        self.tmp = parent / f".{self.path.name}.partial-{os.getpid()}"

    def __enter__(self) -> Path:
        if self.tmp.exists():
            shutil.rmtree(self.tmp)
        try:
            self.tmp.mkdir()
        except OSError as exc:
            raise OutputError(f"{self.tmp.parent}: cannot write output ({exc.strerror})") from None
        return self.tmp

    def __exit__(self, exc_type, exc, tb) -> bool:
        if exc_type is not None:
            shutil.rmtree(self.tmp, ignore_errors=True)
            return False
        old = None
        if self.path.exists():
            old = self.path.parent / f".{self.path.name}.old-{os.getpid()}"
            os.replace(self.path, old)
        os.replace(self.tmp, self.path)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
        return False
