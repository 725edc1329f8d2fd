"""The I/Q imbalance of a receiver's front end taken out blindly, for circular modulations (QPSK, OQPSK).

A front end whose I and Q paths differ in gain or are not exactly in quadrature records ``x = mu s + nu s*``: the
signal plus its mirror image, ``|nu / mu|^2`` under it (an image 13 dB down at 3 dB and 15 degrees), which a
soft-decoded link near its threshold cannot afford.  QPSK and OQPSK are circular, ``E[s^2] = 0``, and so is the
noise; so ``E[x^2] / E[|x|^2] = 2 rho / (1 + |rho|^2)`` with ``rho = nu / conj(mu)``, and ``x - rho conj(x) =
(|mu|^2 - |nu|^2) / conj(mu) s`` has no image.  BPSK is not circular (``E[s^2]`` is the signal's own power when the
carrier is near 0 Hz), so it is left alone.

A residual carrier is not circular either (its own line is a deterministic part), but that line gives the image
directly: the image ``nu s*`` carries the carrier's line at minus its frequency, so with the carrier loop's phase
``theta``, ``E[x exp(+j theta)] / conj(E[x exp(-j theta)]) = rho`` (:class:`MirrorLine`).
"""

from __future__ import annotations

import math

import numpy as np

from pipeline.demod._kernels import iq_sums, remove_image

__all__ = ["IQ_LOOK_SAMPLES", "IqBalance", "MirrorLine"]

#: Samples at the start of each block the estimate is taken from (about 4 us).
IQ_LOOK_SAMPLES = 4096
#: Weight of a block in the estimate once 16 blocks were seen (a plain mean before).
IQ_WEIGHT = 1.0 / 16.0
#: ``|E[x^2]| / E[|x|^2]`` under which nothing is done (an image 46 dB down and less: nothing to gain).
IQ_MIN_RATIO = 0.01


def _image_db(rho: complex) -> float:
    """``20 log10 |rho|``: the image's level under the signal (-inf for no estimate)."""
    return 20.0 * math.log10(abs(rho)) if rho else float("-inf")


def _without_image(block: np.ndarray, rho: complex) -> np.ndarray:
    """A copy of ``block`` with the image ``rho conj(x)`` taken out (:func:`~pipeline.demod._kernels.remove_image`)."""
    out = np.array(block, dtype=np.complex64)
    remove_image(out.view(np.float32), float(rho.real), float(rho.imag))
    return out


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
        return _image_db(self.rho)

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
        return _without_image(block, self.rho) if self.applied else block


class MirrorLine:
    """The image ratio ``rho`` of a front end measured on a residual carrier's mirror line and, once it stands clear
    of its own noise, taken out.

    Attributes
    ----------
    rho : complex
        The estimate (0 until a locked block was measured).
    applied : bool
        Whether the last :meth:`apply` took the image out.

    Notes
    -----
    With ``x = mu s + nu s*`` and a carrier loop locked to the direct carrier's phase ``theta`` (that of ``mu A
    exp(j phi)``), the loop-frame carrier is ``sum x exp(-j theta) = n |mu| A_c`` and the mirror line ``sum x exp(+j
    theta) = n nu A_c exp(j arg mu)`` (the data sidebands and the noise have no mean), so their ratio
    ``sum x e^{+j theta} / conj(sum x e^{-j theta}) = nu / conj(mu) = rho``, the ratio :class:`IqBalance` estimates
    for circular signals, and ``x - rho conj(x)`` (:func:`~pipeline.demod._kernels.remove_image`) has no image and
    the direct signal's phase.  The direct carrier itself adds ``(sum x e^{-j theta} / n) sum exp(2 j theta)`` to
    the mirror sum (a line turning at twice the carrier's frequency: small unless the carrier is near 0 Hz), which
    is taken out; blocks with the carrier within a few bins of 0 Hz, where the two lines are one, are not used.
    The sums come from the carrier loop (:func:`pipeline.demod.residual._kernels.track_carrier`) over samples this
    class may already have corrected with ``rho0``.  BPSK (suppressed carrier) gives the same sums in the symbol
    domain with its decisions ``d`` taking the data off (:func:`~pipeline.demod._kernels.mirror_sums`): the
    matched filter is real and linear, so ``y d = |mu| A + nu A e^{j arg mu} e^{-2 j T}`` with ``T`` the total
    carrier phase, and ``sum y d e^{2 j T} / conj(sum y d)`` is ``rho`` as well; near 0 Hz (``T`` not turning)
    BPSK's image is a mere change of its complex gain, which ``sum e^{2 j T}`` tells (such blocks are not used).
    Either way the sums are over samples this class may have corrected with ``rho0``; they are brought back to the
    recorded samples exactly (``x = (x' + rho0 conj(x')) / (1 - |rho0|^2)``, linear in ``x'``), so the estimate is
    open-loop.  The blocks' sums are averaged as :class:`IqBalance` averages its ratios (a plain mean over the
    first 16 blocks, then weight 1/16).  Applied when ``|rho|`` is over half of :data:`IQ_MIN_RATIO` (an image 46
    dB down) and over five times its standard deviation, at most ``1 / (a sqrt(N))`` for ``N`` samples (symbols)
    averaged and a carrier (data) amplitude ``a`` relative to the root of their mean power (the samples' power,
    the gain's reference, is 1; the symbols' is passed to :meth:`update`): everything but it is at most that.
    """

    def __init__(self) -> None:
        self.rho = 0j
        self.applied = False
        self._used = 0j
        self._img = 0j
        self._dir = 0j
        self._len = 0.0
        self._blocks = 0
        self._n_eff = 0.0

    @property
    def image_db(self) -> float:
        """``20 log10 |rho|``: the image's level under the signal (-inf before an estimate)."""
        return _image_db(self.rho)

    def significant(self) -> bool:
        """Whether the estimate stands clear of its noise (and of an image too small to matter)."""
        a = abs(self._dir) / self._len if self._len > 0.0 else 0.0
        r = abs(self.rho)
        return a > 0.0 and self._n_eff > 0.0 and r > 0.5 * IQ_MIN_RATIO and r * a * math.sqrt(self._n_eff) > 5.0

    def apply(self, block: np.ndarray) -> np.ndarray:
        """``block`` with the image taken out (a new array), or ``block`` itself while the estimate does not stand
        clear of its noise; the sums of the next :meth:`update` are taken to be over what this returned."""
        self.applied = self.significant()
        self._used = self.rho if self.applied else 0j
        return _without_image(block, self._used) if self.applied else block

    def update(self, n: int, direct: complex, mirror: complex, double: complex, power: float = 0.0) -> None:
        """One locked block's sums over the ``n`` samples :meth:`apply` returned: ``direct = sum x e^{-j theta}``,
        ``mirror = sum x e^{+j theta}``, ``double = sum e^{2 j theta}`` (any common gain); ``power`` the mean of
        ``|x|^2`` in the same units when it is not 1 (the sums are scaled to it, so the test's amplitude is
        relative to the samples' power)."""
        if n <= 0:
            return
        if power > 0.0:
            scale = 1.0 / math.sqrt(power)
            direct, mirror = direct * scale, mirror * scale
        r0 = self._used
        if r0:
            d = 1.0 - abs(r0) ** 2
            direct, mirror = (direct + r0 * mirror.conjugate()) / d, (mirror + r0 * direct.conjugate()) / d
        mirror -= direct / n * double
        self._blocks += 1
        w = max(IQ_WEIGHT, 1.0 / self._blocks)
        self._img += w * (mirror - self._img)
        self._dir += w * (direct - self._dir)
        self._len += w * (n - self._len)
        self._n_eff = min(self._n_eff + n, n * (2.0 - IQ_WEIGHT) / IQ_WEIGHT)
        self.rho = self._img / self._dir.conjugate() if self._dir else 0j

    def conjugate(self) -> None:
        """The samples are conjugated from now on (a spectrally inverted recording): the estimate with them."""
        self._img = self._img.conjugate()
        self._dir = self._dir.conjugate()
        self.rho = self.rho.conjugate()
