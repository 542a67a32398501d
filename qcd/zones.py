"""Time zones: a rig's local clock. qcd stores and compares Unix seconds (UTC); header times
without a zone are the acquisition PC's wall clock, read in the rig's zone, and every time a
person reads is shown in the zone it belongs to, with the zone named.

A zone is an IANA name (``"America/Los_Angeles"``) through the standard library's zoneinfo
(the ``tzdata`` package supplies the data where the operating system has none), or None for
the machine's own zone. Imports qcd.errors only.
"""
from __future__ import annotations

from datetime import datetime, timezone, tzinfo
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

__all__ = ["get_zone", "check_zone", "localize", "local_time", "local_text", "zone_name",
           "local_date", "local_day_start"]


def get_zone(name: str | None) -> tzinfo | None:
    """The zone of an IANA name; None (the machine's zone) for None or ''.

    ValueError names the zone when it is unknown.
    """
    if not name:
        return None
    if name.upper() == "UTC":
        return timezone.utc
    try:
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        raise ValueError(f"unknown time zone {name!r}: expected an IANA name such as "
                         f"'Europe/Berlin' or 'America/Los_Angeles'") from None


def check_zone(name: str) -> str:
    """``name`` when it is a known zone (ValueError otherwise)."""
    get_zone(name)
    return name


def localize(naive: datetime, zone: str | None) -> datetime:
    """A header's wall-clock time (no zone) read in ``zone`` -> an aware datetime.

    An aware datetime comes back as it is. A wall time that a DST change skips or repeats
    takes the first reading (zoneinfo's fold=0).
    """
    if naive.tzinfo is not None:
        return naive
    z = get_zone(zone)
    if z is None:
        return naive.astimezone()               # the machine's zone, its own DST rules
    return naive.replace(tzinfo=z)


def local_time(t: float, zone: str | None) -> datetime:
    """Unix seconds -> an aware datetime in ``zone`` (None: the machine's)."""
    z = get_zone(zone)
    if z is None:
        return datetime.fromtimestamp(t).astimezone()
    return datetime.fromtimestamp(t, tz=z)


def local_text(t: float | None, zone: str | None, fmt: str = "%Y-%m-%d %H:%M") -> str:
    """'2026-11-03 08:00 PST': Unix seconds in ``zone`` with the zone's abbreviation
    (or its UTC offset where the zone has no abbreviation); '-' for None."""
    if t is None:
        return "-"
    dt = local_time(float(t), zone)
    return f"{dt.strftime(fmt)} {_abbrev(dt)}"


def _abbrev(dt: datetime) -> str:
    name = dt.tzname() or ""
    if not name or name[0] in "+-":               # zones without an abbreviation: '+09' -> UTC+9
        off = dt.utcoffset()
        if off is None:
            return name
        mins = int(off.total_seconds() // 60)
        sign = "+" if mins >= 0 else "-"
        h, m = divmod(abs(mins), 60)
        return f"UTC{sign}{h}" + (f":{m:02d}" if m else "")
    return name


def zone_name(zone: str | None, at: float | None = None) -> str:
    """The zone as a reader should see it: 'America/Los_Angeles', or for the machine's zone
    its abbreviation at ``at`` (now when None) with '(this computer)'."""
    if zone:
        return "UTC" if zone.upper() == "UTC" else zone
    dt = datetime.now().astimezone() if at is None else datetime.fromtimestamp(at).astimezone()
    return f"{_abbrev(dt)} (this computer's zone)"


def local_date(t: float, zone: str | None) -> str:
    """The local calendar date of ``t`` ('2026-11-03')."""
    return local_time(t, zone).strftime("%Y-%m-%d")


def local_day_start(t: float, zone: str | None, hhmm: str = "00:00") -> float:
    """Unix seconds of ``hhmm`` local time on the local date of ``t`` (DST-aware)."""
    dt = local_time(t, zone)
    h, m = (int(x) for x in hhmm.split(":"))
    wall = dt.replace(hour=h, minute=m, second=0, microsecond=0, tzinfo=None)
    return localize(wall, zone).timestamp()
