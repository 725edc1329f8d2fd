"""Reading the orbit package's text files (element sets, ephemerides, tracking data messages)."""

from __future__ import annotations

import os
from pathlib import Path

from pipeline.errors import DataFileError

__all__ = ["read_text_file", "refuse_xml"]


def read_text_file(path: str | os.PathLike, *, what: str, max_bytes: int, encoding: str = "utf-8") -> tuple[Path, str]:
    """``(path, text)`` of a small text file, or one :class:`DataFileError` naming the file and ``what`` it is.

    Raises
    ------
    DataFileError
        Missing, larger than ``max_bytes``, not text in ``encoding``, or unreadable.
    """
    p = Path(os.fspath(path))
    try:
        size = p.stat().st_size
        if size > max_bytes:
            raise DataFileError(f"{p}: too large for {what} ({size} bytes)")
        return p, p.read_text(encoding=encoding)
    except FileNotFoundError:
        raise DataFileError(f"{p}: {what} not found") from None
    except UnicodeDecodeError:
        raise DataFileError(f"{p}: {what} is not {encoding.upper()} text") from None
    except OSError as exc:
        raise DataFileError(f"{p}: cannot read {what} ({exc.strerror})") from None


def bracket_step(line: str, state: str, transitions: dict, where: str) -> str | None:
    """The state after a block keyword of a CCSDS key-value message (``META_STOP``, ``DATA_START`` ...).

    ``transitions`` maps a keyword to ``(states it may follow, new state, message when it may not)``.
    Returns None when ``line`` is not one of those keywords; raises :class:`DataFileError` (``where`` and the
    message) when it comes out of order.
    """
    rule = transitions.get(line)
    if rule is None:
        return None
    allowed, new, message = rule
    if state not in allowed:
        raise DataFileError(f"{where}: {message}")
    return new


def keyword_value(line: str, where: str) -> tuple[str, str]:
    """``KEYWORD = value`` split and stripped (CCSDS key-value notation); DataFileError otherwise."""
    key, eq, value = line.partition("=")
    key, value = key.strip(), value.strip()
    if not eq or not key:
        raise DataFileError(f"{where}: expected 'KEYWORD = value', got {line[:60]!r}")
    return key, value


def refuse_xml(text: str, source: str, what: str) -> None:
    """:class:`DataFileError` naming ``source`` when ``text`` is a CCSDS message in its XML form.

    The orbit package reads the key-value notation (KVN) only; an XML message (its first character ``<``)
    would otherwise be refused at its first line as an unknown keyword.
    """
    if text.lstrip().startswith("<"):
        raise DataFileError(f"{source}: {what} in XML form; only the key-value form (KVN) is read")
