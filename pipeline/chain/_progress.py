"""Progress of a decode on stderr: a bar with rate and time left when stderr is a terminal, else nothing."""

from __future__ import annotations

import sys

__all__ = ["Progress"]


class Progress:
    """A progress bar over ``total`` units (samples or channel symbols), drawn by tqdm.

    Parameters
    ----------
    total : int or None
        Units in the whole input; None for a stream of unknown length (the bar then counts only).
    enabled : bool, keyword-only
        False (or stderr not a terminal) draws nothing.
    unit : str, keyword-only
        What is counted ("sample", "symbol").
    """

    def __init__(self, total: int | None, *, enabled: bool, unit: str = "sample"):
        self._bar = None
        self._done = 0
        if enabled and sys.stderr.isatty():
            from tqdm import tqdm

            self._bar = tqdm(total=total, unit=unit, unit_scale=True, file=sys.stderr, leave=False,
                             dynamic_ncols=True, mininterval=0.2, desc="decoding")

    def update(self, done: int) -> None:
        """``done`` units are now finished (monotonic)."""
        if self._bar is not None and done > self._done:
            self._bar.update(done - self._done)
            self._done = done

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
