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
        from pipeline.timescales import NS_PER_DAY, NS_PER_S, format_utc, leap_seconds, posix_ns_from_tai

        self.timebase = timebase
        self.receive_delay_ns = int(profile.station.receive_delay_ns)
        # half a modulation symbol period in positions (samples); symbol files name the leading edge already
        rate = profile.link.symbol_rate_baud
        self.half_symbol = 0.0 if sample_rate_hz is None else 0.5 * float(sample_rate_hz) / rate
        self._format = format_utc
        self._posix = posix_ns_from_tai
        self._leap = leap_seconds()  # format_utc's table
        self._ns_per_s, self._ns_per_day = NS_PER_S, NS_PER_DAY
        # (TAI ns from, to, "YYYY-MM-DDT"): the part of the UTC day of the last ERT text without a leap second,
        # where the text is that date and the time of day (see :meth:`ert`)
        self._day: tuple[int, int, str] = (0, 0, "")

    def ert_tai_ns(self, position: float) -> int:
        """ERT of the channel symbol centred at ``position``, TAI ns since 1958."""
        return self.timebase.tai_ns(float(position) - self.half_symbol) - self.receive_delay_ns

    def ert(self, position: float) -> str:
        """ERT as ISO-8601 UTC text with 9 decimals and ``Z``.

        The text of :func:`pipeline.timescales.format_utc`; an instant in the same UTC day as the last one, and
        not in a leap second, takes that day's date and only the time of day is worked out (frames come in
        time order, so nearly all do).
        """
        tai = self.ert_tai_ns(position)
        lo, hi, date = self._day
        if type(tai) is int and lo <= tai < hi:
            secs, frac = divmod(tai - lo, self._ns_per_s)
            hh, rem = divmod(secs, 3600)
            mm, ss = divmod(rem, 60)
            return f"{date}{hh:02d}:{mm:02d}:{ss:02d}.{frac:09d}Z"
        text = self._format(tai)
        day58, ns_of_day = self._leap.day_from_tai(int(tai))
        if ns_of_day < self._ns_per_day:  # (in a leap second: no day part is remembered)
            start = int(tai) - ns_of_day
            self._day = (start, start + min(self._leap.day_length_ns(day58), self._ns_per_day), text[:11])
        return text

    def received_tai_ns(self, position: float) -> int:
        """Reception time of the sample at ``position`` itself (no symbol shift), TAI ns: for measurements
        that refer to an instant rather than to a symbol (the carrier track)."""
        return self.timebase.tai_ns(float(position)) - self.receive_delay_ns

    def utc_ns(self, position: float) -> int:
        """:meth:`received_tai_ns` on the POSIX count (for the Doppler rows, which format POSIX time)."""
        return self._posix(self.received_tai_ns(position))
