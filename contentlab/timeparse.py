"""The one date-time parser: every date or time the user gives goes through here.

Post histories (``published_at``), drafts (``publish_at``), results (``at``),
``score --at``, ``record --at`` and ``report --week/--from/--to`` all accept the
same thing: ISO 8601, year first. A date alone (``2026-03-14``) or a date and
time (``2026-03-14T09:30``, ``2026-03-14 09:30:15``), with or without a UTC
offset in any of its ISO forms (``Z``, ``+01``, ``+0100``, ``+01:00``). A time
without an offset is local time in the workspace's time zone. Such a time
inside an hour the clocks skipped, or in one they repeated, is read all the
same (moved forward; the first of the two), and flagged, so that every reader
can tell the user what was assumed (:meth:`ParsedTimes.clock_notes`).

Everything else is refused with the same words wherever it comes from: a
day/month form such as ``03/12/2026`` (which is 3 December in one country and
12 March in another), a one-digit offset such as ``+1``, and a year outside
:data:`YEAR_MIN` to :data:`YEAR_MAX`. The window keeps every stored date inside
what pandas and NumPy compute with (nanosecond timestamps end in 2262), so no
accepted value can break a later ``learn``, ``score`` or ``report``.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta

import numpy as np

from .errors import ContentlabError

YEAR_MIN, YEAR_MAX = 1970, 2200
EXAMPLES = "e.g. 2026-03-14, 2026-03-14T09:30 or 2026-03-14T09:30:00+01:00"
STORED_FORMAT = "%Y-%m-%dT%H:%M:%S+00:00"

_ISO = re.compile(
    r"^(?P<year>\d{4})-(?P<month>\d{2})-(?P<day>\d{2})"
    r"(?:[T ](?P<hour>\d{1,2}):(?P<minute>\d{2})(?::(?P<second>\d{2})(?:[.,](?P<frac>\d{1,9}))?)?"
    r"(?P<offset>[zZ]|[+-]\d{2}(?::?\d{2})?)?)?$"
)
_DAY_MONTH = re.compile(r"^\d{1,2}[/.\-]\d{1,2}[/.\-]\d{2,4}(?:\b|[T ])")
_SHORT_OFFSET = re.compile(r"\d{1,2}:\d{2}(?::\d{2}(?:[.,]\d+)?)?\s*(?P<offset>[+-]\d(?::?\d{2})?)$")
_WEEK = re.compile(r"^(\d{4})-?W(\d{1,2})$", re.IGNORECASE)

__all__ = [
    "EXAMPLES",
    "ParsedTimes",
    "clock_notes_for",
    "YEAR_MAX",
    "YEAR_MIN",
    "parse_date",
    "parse_datetime",
    "parse_datetimes",
    "parse_iso_week",
    "why_not_iso",
]


@dataclass
class ParsedTimes:
    """Result of :func:`parse_datetimes`, one entry per input value.

    ``stored``: ``YYYY-MM-DD`` for a date alone, UTC ``YYYY-MM-DDTHH:MM:SS+00:00``
    for a date-time, ``""`` where empty or refused. ``has_time``: a clock time was
    given. ``empty``: the cell was blank. ``errors``: why a non-empty value was
    refused (None where it was read). ``skipped_hour``: a local time (no offset)
    that does not exist in ``timezone`` because the clocks went forward over it;
    stored as the moment they changed. ``repeated_hour``: a local time that
    happens twice because the clocks went back; stored as the first. ``wall``:
    the local time as given for those two kinds ("" elsewhere), for the notes.
    """

    stored: np.ndarray
    has_time: np.ndarray
    empty: np.ndarray
    errors: np.ndarray
    skipped_hour: np.ndarray
    repeated_hour: np.ndarray
    wall: np.ndarray
    timezone: str

    @property
    def failed(self) -> np.ndarray:
        return np.array([e is not None for e in self.errors], dtype=bool)

    def clock_notes(self, place: Callable[[list[int]], str], among: np.ndarray | None = None) -> list[str]:
        """At most two notes (a skipped hour, a repeated hour): the values met, what was assumed, how to be exact.

        ``place(positions)`` names where those values are, e.g. ``posts.csv: rows 5, 9, column 'published_at'``
        or ``--at``; ``among`` (a mask) limits the notes to some values, such as the rows an import stores.
        The data is kept as read; a note only says how it was read.
        """
        notes = []
        for flags, words in ((self.skipped_hour, _skipped_words), (self.repeated_hour, _repeated_words)):
            positions = np.flatnonzero(flags if among is None else flags & among).tolist()
            if positions:
                first = positions[0]
                text = words(str(self.wall[first]), str(self.stored[first]), self.timezone, len(positions) - 1)
                notes.append(f"{place(positions)}: {text}")
        return notes


def why_not_iso(text: str) -> str:
    """The one sentence that says why ``text`` is not a date the tool reads (for a value that failed)."""
    shown = text if len(text) <= 40 else text[:39] + "…"
    if _DAY_MONTH.match(text):
        return (f"'{shown}' is a day/month form, which reads differently from country to country; "
                f"write the date year first as ISO 8601 ({EXAMPLES})")
    m = _SHORT_OFFSET.search(text)
    if m:
        return (f"'{shown}' has the UTC offset '{m.group('offset')}'; write offsets with two-digit hours: "
                "Z, +01, +0100 or +01:00")
    m = _ISO.match(text)
    if m:
        year = int(m.group("year"))
        if not YEAR_MIN <= year <= YEAR_MAX:
            return (f"'{shown}': year {year} is outside the years contentlab works with ({YEAR_MIN} to {YEAR_MAX}); "
                    "check the year")
        off = m.group("offset")
        if off and len(off) > 3 and int(off[-2:]) >= 60:
            return f"'{shown}': the offset '{off}' has more than 59 minutes; check it (e.g. +05:30)"
        return (f"'{shown}' is not an ISO 8601 date or date-time: no such calendar date or clock time; check the day, "
                "month and hour")
    epoch = _epoch_hint(text)
    if epoch:
        return f"'{shown}' looks like a Unix time (counted from 1970); write it as {epoch} ({EXAMPLES})"
    return f"'{shown}' is not an ISO 8601 date or date-time ({EXAMPLES}); write it in one of those forms"


def _epoch_hint(text: str) -> str | None:
    """The UTC time a 9-10 digit number (or 12-13 digits, in milliseconds) stands for as a Unix time, or None."""
    if not re.fullmatch(r"\d{9,10}(\d{3})?", text):
        return None
    seconds = int(text) / (1000 if len(text) > 10 else 1)
    when = datetime.fromtimestamp(seconds, tz=UTC)
    return when.strftime("%Y-%m-%dT%H:%M:%SZ") if YEAR_MIN <= when.year <= YEAR_MAX else None


def _norm_offset(off: str) -> str:
    if off in ("Z", "z"):
        return "+00:00"
    if len(off) == 3:
        return off + ":00"
    if len(off) == 5:
        return off[:3] + ":" + off[3:]
    return off


def parse_datetimes(values, timezone: str) -> ParsedTimes:
    """Read many values at once (a column of an export); never raises for a bad value.

    Date-times become UTC; those without an offset are read in ``timezone``
    (an hour that happens twice at a daylight-saving change is read as its
    first occurrence; one that does not exist moves forward). A date alone
    stays a date: its hour is unknown.
    """
    import pandas as pd

    series = values if isinstance(values, pd.Series) else pd.Series(list(values), dtype=object)
    n = len(series)
    text = series.astype(object).where(series.notna(), "").astype(str).str.strip().reset_index(drop=True)
    stored = np.full(n, "", dtype=object)
    has_time = np.zeros(n, dtype=bool)
    empty = (text == "").to_numpy()
    errors = np.full(n, None, dtype=object)
    skipped = np.zeros(n, dtype=bool)
    repeated = np.zeros(n, dtype=bool)
    wall = np.full(n, "", dtype=object)
    shaped = text.str.fullmatch(_ISO.pattern[1:-1]).to_numpy(dtype=bool) & ~empty
    year = pd.to_numeric(text.str.slice(0, 4), errors="coerce").to_numpy()
    ok = shaped & (year >= YEAR_MIN) & (year <= YEAR_MAX)
    lengths = text.str.len().to_numpy()
    date_only = ok & (lengths == 10)
    if date_only.any():
        idx = np.flatnonzero(date_only)
        parsed = pd.to_datetime(text.iloc[idx], format="%Y-%m-%d", errors="coerce")
        good = parsed.notna().to_numpy()
        stored[idx[good]] = text.iloc[idx[good]].to_numpy(dtype=object)
        ok[idx[~good]] = False
    timed = np.flatnonzero(ok & ~date_only)
    if len(timed):
        sub = text.iloc[timed]
        # The common forms go to pandas as they are; the rest (one-digit hours, '+01', 'z', a decimal
        # comma) are first rewritten into the form pandas reads, from the parts the pattern found.
        out, good, clock = _to_utc(sub, timezone)
        redo = ~good
        if redo.any():
            retry = sub[redo].str.extract(_ISO)
            out2, good2, clock2 = _to_utc(_canonical(retry), timezone)
            out[redo], good[redo] = out2, good2
            for part, part2 in zip(clock, clock2):
                part[redo] = part2
        stored[timed[good]] = out[good]
        has_time[timed[good]] = True
        ok[timed[~good]] = False
        skipped[timed], repeated[timed], wall[timed] = clock
    for i in np.flatnonzero(~ok & ~empty):
        errors[i] = why_not_iso(text.iat[i])
    return ParsedTimes(stored=stored, has_time=has_time, empty=empty, errors=errors, skipped_hour=skipped,
                       repeated_hour=repeated, wall=wall, timezone=timezone)


_HAS_OFFSET = r"(?:[zZ]|[+-]\d{2}(?::?\d{2})?)$"


def _to_utc(text, timezone: str) -> tuple[np.ndarray, np.ndarray, tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """Date-time text -> (stored UTC text, parsed, (in a skipped hour, in a repeated hour, local time as given));
    with an offset as given, without one in ``timezone``."""
    import pandas as pd

    out = np.full(len(text), "", dtype=object)
    good = np.zeros(len(text), dtype=bool)
    skipped = np.zeros(len(text), dtype=bool)
    repeated = np.zeros(len(text), dtype=bool)
    wall = np.full(len(text), "", dtype=object)
    with_off = text.str.contains(_HAS_OFFSET, regex=True).to_numpy(dtype=bool)
    if with_off.any():
        stamps = pd.to_datetime(text[with_off], format="ISO8601", utc=True, errors="coerce")
        g = stamps.notna().to_numpy()
        vals = np.full(with_off.sum(), "", dtype=object)
        vals[g] = stamps[g].dt.strftime(STORED_FORMAT).to_numpy(dtype=object)
        out[with_off], good[with_off] = vals, g
    if (~with_off).any():
        naive = pd.to_datetime(text[~with_off], format="ISO8601", errors="coerce")
        g = naive.notna().to_numpy()
        m = int((~with_off).sum())
        vals, gap, twice, given = (np.full(m, "", dtype=object), np.zeros(m, dtype=bool), np.zeros(m, dtype=bool),
                                   np.full(m, "", dtype=object))
        if g.any():
            utc, gap[g], twice[g] = _localise(naive[g], timezone)
            vals[g] = utc.dt.strftime(STORED_FORMAT).to_numpy(dtype=object)
            flagged = gap | twice
            if flagged.any():
                given[flagged] = naive[flagged].map(_wall_text).to_numpy(dtype=object)
        out[~with_off], good[~with_off] = vals, g
        skipped[~with_off], repeated[~with_off], wall[~with_off] = gap, twice, given
    return out, good, (skipped, repeated, wall)


def _canonical(p):
    """Parts found by :data:`_ISO` -> ``YYYY-MM-DDTHH:MM:SS[.f][+hh:mm]``, the form pandas reads."""
    clock = (p["year"] + "-" + p["month"] + "-" + p["day"] + "T" + p["hour"].str.zfill(2) + ":" + p["minute"]
             + ":" + p["second"].fillna("00"))
    frac = p["frac"].fillna("")
    clock = clock.where(frac == "", clock + "." + frac)
    return clock + p["offset"].fillna("").map(_norm_offset)


def _localise(naive, timezone: str):
    """Naive local times -> (UTC, in a skipped hour, in a repeated hour).

    The first of a repeated hour; a skipped one is moved forward to the moment the clocks changed. Only the
    values the first pass could not place are localised again, so the common case costs one pass.
    """
    utc = naive.dt.tz_localize(timezone, ambiguous="NaT", nonexistent="NaT").dt.tz_convert("UTC")
    missing = utc.isna().to_numpy()
    skipped = np.zeros(len(naive), dtype=bool)
    repeated = np.zeros(len(naive), dtype=bool)
    if missing.any():
        first = naive[missing].dt.tz_localize(timezone, ambiguous=True, nonexistent="NaT")
        gap = first.isna().to_numpy()
        if gap.any():
            first[gap] = naive[missing][gap].dt.tz_localize(timezone, ambiguous=True, nonexistent="shift_forward")
        utc.loc[first.index] = first.dt.tz_convert("UTC")
        skipped[np.flatnonzero(missing)[gap]] = True
        repeated[np.flatnonzero(missing)[~gap]] = True
    return utc, skipped, repeated


def _wall_text(stamp) -> str:
    """A local clock time as the notes show it: ``2026-03-29 02:30`` (seconds only when given)."""
    return stamp.strftime("%Y-%m-%d %H:%M:%S" if stamp.second or stamp.microsecond else "%Y-%m-%d %H:%M")


def _offset_text(when: datetime) -> str:
    """A UTC offset as ISO 8601 writes it: ``+02:00``."""
    minutes = int(when.utcoffset().total_seconds() // 60)
    sign = "-" if minutes < 0 else "+"
    return f"{sign}{abs(minutes) // 60:02d}:{abs(minutes) % 60:02d}"


def _zone_times(wall: str, stored: str, timezone: str) -> tuple[datetime, datetime, datetime]:
    """(the given wall time read with the offset before a change (fold 0), after it (fold 1), the stored moment
    in local time); zoneinfo follows PEP 495 for times in a gap or an overlap."""
    import zoneinfo

    zone = zoneinfo.ZoneInfo(timezone)
    given = datetime.fromisoformat(wall)
    stamp = datetime.fromisoformat(stored).astimezone(zone)
    return given.replace(tzinfo=zone, fold=0), given.replace(tzinfo=zone, fold=1), stamp


def _exact(wall: str, when: datetime) -> str:
    return wall.replace(" ", "T") + _offset_text(when)


def _more(count: int) -> str:
    return f"; {count} more such time{'s' if count > 1 else ''} read the same way" if count else ""


def _skipped_words(wall: str, stored: str, timezone: str, more: int) -> str:
    before, _, read = _zone_times(wall, stored, timezone)
    return (f"{wall} does not exist in {timezone} (clocks went forward): read as {read:%H:%M} "
            f"({_offset_text(read)}), the moment they changed{_more(more)}. To be exact, write the UTC offset, "
            f"e.g. {_exact(wall, before)} for the time on a clock not yet changed.")


def _repeated_words(wall: str, stored: str, timezone: str, more: int) -> str:
    _, second, read = _zone_times(wall, stored, timezone)
    summer = "summer-time " if read.dst() else ""
    return (f"{wall} occurs twice in {timezone} (clocks went back): read as the first, {summer}{read:%H:%M} "
            f"({_offset_text(read)}){_more(more)}. Write the offset, e.g. {_exact(wall, second)}, to mean the second.")


def clock_notes_for(value, timezone: str, where: str) -> list[str]:
    """The note for one value given as an option (``--ends-at``) when it falls in an hour the clocks skipped or
    repeated; none otherwise (a value that is not a time is refused where it is read, not here)."""
    return parse_datetimes([value], timezone).clock_notes(lambda positions: where)


def parse_datetime(value, timezone: str, where: str = ""):
    """One value -> (local timestamp in ``timezone`` or None when blank, has a clock time).

    A date alone gives midnight of that day with ``has_time`` False. Raises
    :class:`ContentlabError` with ``where`` (e.g. ``--at`` or ``drafts.csv: row 3,
    column 'publish_at'``) and the shared reason for anything not ISO 8601.
    """
    import pandas as pd

    if isinstance(value, pd.Timestamp):
        value = value.isoformat()
    elif value is not None and not isinstance(value, str):
        if isinstance(value, float) and value != value:
            value = None
        else:
            value = str(value)
    result = parse_datetimes(pd.Series([value], dtype=object), timezone)
    if result.empty[0]:
        return None, False
    if result.errors[0] is not None:
        prefix = f"{where}: " if where else ""
        raise ContentlabError(prefix + result.errors[0] + ".")
    text = result.stored[0]
    if result.has_time[0]:
        return pd.Timestamp(text).tz_convert(timezone), True
    return pd.Timestamp(text).tz_localize(timezone, nonexistent="shift_forward", ambiguous=True), False


def parse_date(value, where: str) -> date:
    """A calendar date (``--from``/``--to``): ISO 8601 ``YYYY-MM-DD`` within the year window."""
    text = str(value).strip()
    result = parse_datetimes([text], "UTC")
    if result.errors[0] is not None or result.empty[0]:
        reason = result.errors[0] or f"'' is not an ISO 8601 date ({EXAMPLES})"
        raise ContentlabError(f"{where}: {reason}.")
    if result.has_time[0]:
        raise ContentlabError(f"{where}: '{text}' is a date-time; give a date alone, e.g. 2026-11-23.")
    return date.fromisoformat(result.stored[0])


def parse_iso_week(value, where: str = "--week") -> tuple[date, date]:
    """Monday and Sunday of an ISO week written like ``2026-W48`` (or ``2026W48``)."""
    text = str(value).strip()
    m = _WEEK.match(text)
    if not m:
        raise ContentlabError(f"{where} {text!r} is not an ISO week. Write it like 2026-W48.")
    year, week = int(m.group(1)), int(m.group(2))
    if not YEAR_MIN <= year <= YEAR_MAX:
        raise ContentlabError(
            f"{where} {text!r}: year {year} is outside the years contentlab works with ({YEAR_MIN} to {YEAR_MAX}); "
            "check the year."
        )
    try:
        monday = date.fromisocalendar(year, week, 1)
    except ValueError:
        weeks = date(year, 12, 28).isocalendar()[1]
        raise ContentlabError(f"{where} {text!r}: {year} has no ISO week {week} (weeks run 1 to {weeks}).") from None
    return monday, monday + timedelta(days=6)
