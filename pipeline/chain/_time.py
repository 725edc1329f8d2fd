"""Earth-received time of a sample position: the one place where the chain turns positions into time.

ERT of a frame = the instant at which the leading edge of the first channel symbol carrying its ASM reached
the station's reference point (../shared/DESIGN.md): the recording time of that edge minus the station's
receive-path delay (``[station] receive_delay_ns``).  The leading edge is the symbol's centre (its pulse
peak, RRC pulses included; the I rail's symbol on OQPSK; on Bi-phase-L the start of the symbol's first
half) minus half a modulation symbol period.  Time runs on TAI (:mod:`pipeline.timescales`) and becomes
UTC text only here, so a pass across a leap second reads 23:59:60.x inside it.
"""

from __future__ import annotations

from pipeline.profile import LinkProfile

__all__ = ["ERT_DEFINITION", "ErtClock"]

#: The ERT definition as stated in README and report.json.
ERT_DEFINITION = ("UTC at which the leading edge of the first channel symbol of the frame's attached sync marker "
                  "reached the station's reference point: the recording time of that edge (the symbol's centre "
                  "minus half a symbol period) minus [station] receive_delay_ns; a packet's ERT is that of the "
                  "frame holding its first octet")


class ErtClock:
    """Sample position -> Earth-received time (TAI ns and UTC text).

    Parameters
    ----------
    timebase : object with ``tai_ns(position) -> int``
        A :class:`~pipeline.recording.Recording` (positions are sample indices) or a symbol file
        (positions are channel-symbol indices whose time already names the symbol's leading edge).
    profile : LinkProfile
    sample_rate_hz : float or None
        Samples per second of an IQ recording; None for symbol input (no half-symbol shift).

    Examples
    --------
    >>> import pipeline
    >>> from pipeline.timescales import parse_utc
    >>> class Start:  # a recording at 1 Msample/s starting 2016-12-31T23:59:59.5Z
    ...     def tai_ns(self, position):
    ...         return parse_utc("2016-12-31T23:59:59.5Z") + round(position * 1000)
    >>> clock = ErtClock(Start(), pipeline.load_profile(pipeline.demo_profile_path()), 1e6)
    >>> clock.ert(1_000_002.083333)  # one second and half a 240 ksym/s symbol later: inside the leap second
    '2016-12-31T23:59:60.500000000Z'
    """

    def __init__(self, timebase, profile: LinkProfile, sample_rate_hz: float | None):
        from pipeline.timescales import format_utc, posix_ns_from_tai

        self.timebase = timebase
        self.receive_delay_ns = int(profile.station.receive_delay_ns)
        # half a modulation symbol period in positions (samples); symbol files name the leading edge already
        rate = profile.link.symbol_rate_baud
        self.half_symbol = 0.0 if sample_rate_hz is None else 0.5 * float(sample_rate_hz) / rate
        self._format = format_utc
        self._posix = posix_ns_from_tai

    def ert_tai_ns(self, position: float) -> int:
        """ERT of the channel symbol centred at ``position``, TAI ns since 1958."""
        return self.timebase.tai_ns(float(position) - self.half_symbol) - self.receive_delay_ns

    def ert(self, position: float) -> str:
        """ERT as ISO-8601 UTC text with 9 decimals and ``Z``."""
        return self._format(self.ert_tai_ns(position))

    def received_tai_ns(self, position: float) -> int:
        """Reception time of the sample at ``position`` itself (no symbol shift), TAI ns: for measurements
        that refer to an instant rather than to a symbol (the carrier track)."""
        return self.timebase.tai_ns(float(position)) - self.receive_delay_ns

    def utc_ns(self, position: float) -> int:
        """:meth:`received_tai_ns` on the POSIX count (for the Doppler rows, which format POSIX time)."""
        return self._posix(self.received_tai_ns(position))
