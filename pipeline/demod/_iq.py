"""The I/Q imbalance of a receiver's front end taken out blindly, for circular modulations (QPSK, OQPSK).

A front end whose I and Q paths differ in gain or are not exactly in quadrature records ``x = mu s + nu s*``: the
signal plus its mirror image, ``|nu / mu|^2`` under it (an image 13 dB down at 3 dB and 15 degrees), which a
soft-decoded link near its threshold cannot afford.  QPSK and OQPSK are circular, ``E[s^2] = 0``, and so is the
noise; so ``E[x^2] / E[|x|^2] = 2 rho / (1 + |rho|^2)`` with ``rho = nu / conj(mu)``, and ``x - rho conj(x) =
(|mu|^2 - |nu|^2) / conj(mu) s`` has no image.  BPSK is not circular (``E[s^2]`` is the signal's own power when the
carrier is near 0 Hz), so it is left alone; so is a residual carrier.
"""

from __future__ import annotations

import math

import numpy as np

from pipeline.demod._kernels import iq_sums, remove_image

__all__ = ["IQ_LOOK_SAMPLES", "IqBalance"]

#: Samples at the start of each block the estimate is taken from (about 4 us).
IQ_LOOK_SAMPLES = 4096
#: Weight of a block in the estimate once 16 blocks were seen (a plain mean before).
IQ_WEIGHT = 1.0 / 16.0
#: ``|E[x^2]| / E[|x|^2]`` under which nothing is done (an image 46 dB down and less: nothing to gain).
IQ_MIN_RATIO = 0.01


class IqBalance:
    """The image ratio ``rho`` estimated block by block and, once it stands clear of its own noise, taken out.

    Attributes
    ----------
    rho : complex
        The estimate (0 until enough samples were seen).
    applied : bool
        Whether the last block had the image taken out.

    Notes
    -----
    Per block, from its first :data:`IQ_LOOK_SAMPLES` non-zero samples (:func:`~pipeline.demod._kernels.iq_sums`,
    the mean removed): ``c = E[(x - m)^2] / E[|x - m|^2]``, averaged over the blocks (a plain mean over the first
    16, then weight 1/16); ``rho = c / (1 + sqrt(1 - |c|^2))`` (the root of ``c = 2 rho / (1 + |rho|^2)`` inside the
    unit circle).  The image is taken out (:func:`~pipeline.demod._kernels.remove_image`, in place on a copy) when
    ``|c|`` is over :data:`IQ_MIN_RATIO` and over five times its own standard deviation on a circular signal,
    ``sqrt(2 / N)`` for ``N`` samples averaged, so a balanced front end's samples are never touched.  A DC offset
    goes through the correction as ``d - rho conj(d)``, which the DC blocker after it removes.
    """

    def __init__(self) -> None:
        self.rho = 0j
        self.applied = False
        self._c = 0j
        self._blocks = 0
        self._n_eff = 0.0
        self._sums = np.zeros(6, dtype=np.float64)

    @property
    def image_db(self) -> float:
        """``20 log10 |rho|``: the image's level under the signal (-inf before an estimate)."""
        return 20.0 * math.log10(abs(self.rho)) if self.rho else float("-inf")

    def update(self, block: np.ndarray) -> None:
        """Take a block (complex64, contiguous, as recorded) into the estimate."""
        iq_sums(block[:IQ_LOOK_SAMPLES].view(np.float32), self._sums)
        cnt, sr, si, srr, sii, sri = self._sums
        if cnt < 256:
            return
        mr, mi = sr / cnt, si / cnt
        vr, vi, cri = srr / cnt - mr * mr, sii / cnt - mi * mi, sri / cnt - mr * mi
        power = vr + vi
        if not power > 0.0:
            return
        c = complex(vr - vi, 2.0 * cri) / power
        self._blocks += 1
        w = max(IQ_WEIGHT, 1.0 / self._blocks)
        self._c += w * (c - self._c)
        # samples behind the average: all of them over the first 16 blocks, then about (2 - w) / w blocks' worth
        self._n_eff = min(self._n_eff + cnt, cnt * (2.0 - IQ_WEIGHT) / IQ_WEIGHT)
        a = abs(self._c)
        self.rho = self._c / (1.0 + math.sqrt(max(1.0 - a * a, 0.0))) if a < 1.0 else 0j

    def conjugate(self) -> None:
        """The samples are conjugated from now on (a spectrally inverted recording): the estimate with them."""
        self._c = self._c.conjugate()
        self.rho = self.rho.conjugate()

    def apply(self, block: np.ndarray) -> np.ndarray:
        """``block`` with the image taken out (a new array), or ``block`` itself while the estimate does not stand
        clear of its noise."""
        a = abs(self._c)
        self.applied = self._n_eff > 0 and a > IQ_MIN_RATIO and a > 5.0 * math.sqrt(2.0 / self._n_eff)
        if not self.applied:
            return block
        out = np.array(block, dtype=np.complex64)
        remove_image(out.view(np.float32), float(self.rho.real), float(self.rho.imag))
        return out
