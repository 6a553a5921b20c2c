"""Session boundaries: a local time of day in an IANA zone (``"17:00 America/New_York"``).

The boundary is the same wall-clock time in the zone every day, so a session
across a daylight-saving change lasts 23 or 25 hours. A time that does not
exist on a spring-forward day is taken as zoneinfo resolves it (the earlier
offset, so one hour later on the clock); an ambiguous one on a fall-back day
as its first occurrence.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import datetime, time, timedelta
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

_SPEC = re.compile(r"\s*(\d{1,2}):(\d{2})\s+(\S+)\s*")


class SessionError(ValueError):
    """A session_reset text that is not "HH:MM Zone/Name", or names no known zone."""


@dataclass(frozen=True, slots=True)
class SessionReset:
    """A daily boundary at ``hour:minute`` local time in ``zone`` (an IANA name).

    Examples
    --------
    >>> reset = SessionReset.parse("17:00 America/New_York")
    >>> from datetime import datetime, timezone
    >>> after = datetime(2026, 3, 7, 23, 0, tzinfo=timezone.utc).timestamp()  # 18:00 EST
    >>> datetime.fromtimestamp(reset.next_after(after), timezone.utc).isoformat()
    '2026-03-08T21:00:00+00:00'
    """

    hour: int
    minute: int
    zone: str

    @classmethod
    def parse(cls, text: object) -> SessionReset:
        if not isinstance(text, str):
            raise SessionError('must be a string "HH:MM Zone/Name"')
        m = _SPEC.fullmatch(text)
        if m is None:
            raise SessionError('is not "HH:MM Zone/Name" (e.g. "17:00 America/New_York")')
        hour, minute, zone = int(m.group(1)), int(m.group(2)), m.group(3)
        if hour > 23 or minute > 59:
            raise SessionError("is not a time of day from 00:00 to 23:59")
        try:
            ZoneInfo(zone)
        except (ZoneInfoNotFoundError, ValueError):
            raise SessionError(f"names the time zone {zone!r}, which does not exist "
                               "(an IANA name such as \"Europe/London\")") from None
        return cls(hour, minute, zone)

    @property
    def text(self) -> str:
        return f"{self.hour:02d}:{self.minute:02d} {self.zone}"

    def next_after(self, t: float) -> float:
        """The first boundary strictly after unix time t (seconds). O(1)."""
        tz = ZoneInfo(self.zone)
        day = datetime.fromtimestamp(t, tz).date()
        at = time(self.hour, self.minute)
        for k in range(3):   # today's, else tomorrow's (a DST jump can push past it)
            edge = datetime.combine(day + timedelta(days=k), at, tzinfo=tz).timestamp()
            if edge > t:
                return edge
        raise AssertionError("unreachable: a day later is always after t")
