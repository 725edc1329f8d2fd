"""The waterfall of a recording: power spectra on a fixed grid of time rows, accumulated while streaming.

Row ``r`` covers samples ``[r R, (r + 1) R)``; in it ``ffts_per_row`` Hann-windowed FFTs of ``nfft``
samples start at the fixed offsets ``r R + j R / ffts_per_row``.  An FFT belongs to the accumulator that
owns its first sample, so the rows do not depend on how the samples are cut into chunks, and the partial
rows of two segments of one recording add up to the row an unbroken pass would give.
"""

from __future__ import annotations

import numpy as np

__all__ = ["Waterfall", "waterfall_row_samples"]

#: Rows above which the accumulator merges neighbouring rows (memory stays bounded on endless streams).
MAX_ROWS = 2048


def waterfall_row_samples(num_samples: int | None, sample_rate_hz: float, *, nfft: int = 512,
                          rows: int = 600) -> int:
    """Row length (samples, a multiple of ``nfft``) giving about ``rows`` rows; one second for a stream."""
    if num_samples is None:
        target = sample_rate_hz
    else:
        target = max(num_samples / rows, 1.0)
    return int(max(nfft, np.ceil(target / nfft) * nfft))


class Waterfall:
    """Streaming waterfall accumulator.

    Parameters
    ----------
    row_samples : int, keyword-only
        ``R``, samples per row (a multiple of ``nfft``).
    nfft : int, keyword-only
        FFT length (a power of two, 64..8192).
    ffts_per_row : int, keyword-only
        FFTs averaged per row (1..64); their starts are ``R / ffts_per_row`` apart.
    owned : (int, int) or None, keyword-only
        Only FFTs starting in ``[a, b)`` are taken (a segment of a segmented decode).

    Notes
    -----
    Cost: ``ffts_per_row nfft log2(nfft)`` operations per row, about 0.2 % of the samples' FFT cost at
    the defaults.  Memory: ``nfft`` float64 per row, rows merged in pairs above :data:`MAX_ROWS`.

    Examples
    --------
    >>> import numpy as np
    >>> w = Waterfall(row_samples=1024, nfft=256, ffts_per_row=2)
    >>> x = np.exp(2j * np.pi * 0.25 * np.arange(4096)).astype(np.complex64)
    >>> w.feed(x[:1000], 0); w.feed(x[1000:], 1000)
    >>> rows, power_db = w.result()
    >>> rows.tolist(), int(np.argmax(power_db[0])) - 128   # the tone at fs/4 = bin 64 after fftshift
    ([0, 1, 2, 3], 64)
    """

    def __init__(self, *, row_samples: int, nfft: int = 512, ffts_per_row: int = 4,
                 owned: tuple[int, int] | None = None):
        if not isinstance(nfft, int) or nfft < 64 or nfft > 8192 or nfft & (nfft - 1):
            raise ValueError(f"Argument 'nfft' must be a power of two in 64..8192, not {nfft!r}.")
        if not isinstance(row_samples, int) or row_samples < nfft or row_samples % nfft:
            raise ValueError(f"Argument 'row_samples' must be a multiple of nfft = {nfft}, not {row_samples!r}.")
        if not isinstance(ffts_per_row, int) or not 1 <= ffts_per_row <= 64:
            raise ValueError(f"Argument 'ffts_per_row' must be 1..64, not {ffts_per_row!r}.")
        self.row_samples = row_samples
        self.nfft = nfft
        self.step = max(row_samples // ffts_per_row, 1)
        self.owned = owned
        self._window = np.hanning(nfft).astype(np.float32)
        self._scale = 1.0 / float(np.sum(self._window ** 2))
        self._sum: dict[int, np.ndarray] = {}
        self._count: dict[int, int] = {}
        self._carry = np.zeros(0, dtype=np.complex64)
        self._carry_start = 0
        self._merges = 0  # rows merged in pairs this many times (row r now covers 2**merges original rows)

    def feed(self, samples: np.ndarray, start: int) -> None:
        """Add samples ``[start, start + len(samples))``; chunks must come in order without gaps."""
        samples = np.asarray(samples, dtype=np.complex64)
        start = int(start)
        nfft = self.nfft
        if len(self._carry) and self._carry_start + len(self._carry) == start:
            # the FFTs that begin in the carry read a short joined buffer; the rest read the chunk in place
            # (joining the whole chunk to the carry copied every sample once more)
            buf_start = self._carry_start
            head = np.concatenate([self._carry, samples[:nfft - 1]])
        else:
            buf_start = start
            head = samples[:0]
        end = start + len(samples)
        first = -(-buf_start // self.step) * self.step  # the first FFT start at or after buf_start
        starts = np.arange(first, end - nfft + 1, self.step, dtype=np.int64)
        if self.owned is not None:
            starts = starts[(starts >= self.owned[0]) & (starts < self.owned[1])]
        if len(starts):
            taps = np.arange(nfft)[None, :]
            early = starts < start
            windows = np.concatenate([head[(starts[early] - buf_start)[:, None] + taps],
                                      samples[(starts[~early] - start)[:, None] + taps]])
            spec = np.fft.fft(windows * self._window, axis=1)
            power = (spec.real ** 2 + spec.imag ** 2) * self._scale
            rows = (starts // self.row_samples) >> self._merges
            for r in np.unique(rows):
                sel = rows == r
                acc = self._sum.get(int(r))
                total = np.sum(power[sel], axis=0)
                self._sum[int(r)] = total if acc is None else acc + total
                self._count[int(r)] = self._count.get(int(r), 0) + int(np.count_nonzero(sel))
            if len(self._sum) > MAX_ROWS:
                self._merge_pairs()
        keep_from = max(buf_start, end - nfft + 1)
        if keep_from >= start:
            self._carry = np.array(samples[keep_from - start:], dtype=np.complex64)
        else:
            self._carry = np.concatenate([self._carry[keep_from - buf_start:], samples])
        self._carry_start = keep_from

    def _merge_pairs(self) -> None:
        self._merges += 1
        s, c = {}, {}
        for r, v in self._sum.items():
            k = r >> 1
            s[k] = s[k] + v if k in s else v
            c[k] = c.get(k, 0) + self._count[r]
        self._sum, self._count = s, c

    def add(self, other: Waterfall) -> None:
        """Add another accumulator's rows (a later segment of the same recording, same grid)."""
        while other._merges > self._merges:
            self._merge_pairs()
        shift = self._merges - other._merges
        for r, v in other._sum.items():
            k = r >> shift
            self._sum[k] = self._sum[k] + v if k in self._sum else v.copy()
            self._count[k] = self._count.get(k, 0) + other._count[r]

    @property
    def effective_row_samples(self) -> int:
        """Samples per row after any merging."""
        return self.row_samples << self._merges

    def result(self) -> tuple[np.ndarray, np.ndarray]:
        """Row indices (sorted) and their mean power in dB, ``fftshift``-ed (negative frequencies first)."""
        if not self._sum:
            return np.zeros(0, dtype=np.int64), np.zeros((0, self.nfft), dtype=np.float32)
        rows = np.array(sorted(self._sum), dtype=np.int64)
        power = np.stack([self._sum[int(r)] / self._count[int(r)] for r in rows])
        db = 10.0 * np.log10(np.maximum(np.fft.fftshift(power, axes=1), 1e-30))
        return rows, db.astype(np.float32)

    def __getstate__(self) -> dict:
        state = dict(self.__dict__)
        state["_carry"] = np.zeros(0, dtype=np.complex64)  # only finished rows travel between processes
        return state
