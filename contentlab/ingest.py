"""Read post-history exports, map their columns and validate every row.

Nothing here touches the workspace: :func:`read_history` returns the clean
rows and a list of :class:`Problem` records (file, row, column, reason), and
the caller decides whether to write anything.
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import ContentlabError
from .features import clean_headline
from .readers import (MAX_HEADLINE_CHARS, MAX_ID_CHARS, MAX_NAME_CHARS, control_cells, count_cells, file_bytes,
                      header_row, known_names, long_cells, may_hold_controls, read_cells, rows_text, unused_columns)
from .readers import read_bytes, sniff_delimiter  # noqa: F401  (their home is readers; kept importable here)
from .readers import short as _short
from .timeparse import parse_datetimes

REQUIRED = ["post_id", "published_at", "headline", "impressions"]
OUTCOMES = ["clicks", "engagements"]
ENGAGEMENT_PARTS = ["likes", "comments", "shares", "saves"]
OPTIONAL_TEXT = ["channel", "body", "experiment_id", "image_id"]
OPTIONAL_NUMBER = ["cost"]
KNOWN = REQUIRED + OUTCOMES + ENGAGEMENT_PARTS + OPTIONAL_TEXT + OPTIONAL_NUMBER
# Columns stored per post, in this order (see workspace.posts).
STORED = [
    "post_id",
    "published_at",
    "has_time",
    "headline",
    "impressions",
    "clicks",
    "engagements",
    "channel",
    "body",
    "experiment_id",
    "image_id",
    "cost",
]


@dataclass(frozen=True)
class Problem:
    """One reason one row cannot be imported."""

    file: str
    row: int  # line number in the file; the header is line 1
    column: str
    reason: str

    def __str__(self) -> str:
        return f"{self.file}: row {self.row}, column '{self.column}': {self.reason}"


@dataclass
class History:
    """Validated rows of one export, ready to store."""

    posts: pd.DataFrame  # columns STORED plus 'row'
    rejected: pd.DataFrame  # original cells of bad rows plus 'row' and 'problems'
    problems: list[Problem]
    rows_read: int
    ignored_columns: list[str]
    notes: list[str] = field(default_factory=list)  # how local times at a clock change were read


# ------------------------------------------------------------------ reading

def load_mapping(path: Path | None) -> dict[str, str]:
    """Read a TOML column map: ``[columns]`` with ``our_name = "Their Column"``."""
    if path is None:
        return {}
    raw = file_bytes(Path(path), "the column map's .toml file")
    try:
        data = tomllib.loads(raw.decode("utf-8-sig"))  # a BOM some editors add is fine
    except UnicodeDecodeError:
        raise ContentlabError(f"{path}: the column map is not UTF-8 text; save it as UTF-8.") from None
    except tomllib.TOMLDecodeError as exc:
        raise ContentlabError(f"{path}: not valid TOML ({exc}). See the README for an example map.") from None
    columns = data.get("columns")
    if not isinstance(columns, dict) or not columns:
        raise ContentlabError(f"{path}: needs a [columns] table, e.g. headline = \"Post title\".")
    mapping = {}
    for ours, theirs in columns.items():
        if ours not in KNOWN:
            raise ContentlabError(
                f"{path}: '{ours}' is not a contentlab column. Known columns: {', '.join(KNOWN)}."
            )
        if not isinstance(theirs, str) or not theirs:
            raise ContentlabError(f"{path}: the value for '{ours}' must be the export's column name as text.")
        mapping[ours] = theirs
    return mapping


def read_table(path: Path, mapping: dict[str, str]) -> tuple[pd.DataFrame, list[str]]:
    """All cells as text (index: file line numbers), columns renamed to contentlab's names."""
    frame = read_cells(path, "post-history export")
    rename = {}
    for ours, theirs in mapping.items():
        if theirs not in frame.columns:
            raise ContentlabError(
                f"{path}: the map says {ours} = \"{theirs}\" but the file has no column \"{theirs}\". "
                f"Its columns are: {', '.join(frame.columns)}."
            )
        rename[theirs] = ours
    frame = frame.rename(columns=rename)
    frame = frame.rename(columns=known_names([c for c in frame.columns if c not in rename.values()], KNOWN))
    repeated = sorted({c for c in frame.columns if list(frame.columns).count(c) > 1})
    if repeated:
        raise ContentlabError(
            f"{path}: row {header_row(frame)} (header), more than one column would be read as {', '.join(repeated)}. "
            "Rename or remove the extra column, or map only one of them."
        )
    return frame, unused_columns(frame, KNOWN)


# --------------------------------------------------------------- validation

def _count_column(frame: pd.DataFrame, column: str, problems: list):
    """Parse whole non-negative counts (:func:`contentlab.readers.count_cells`); add a problem per bad cell."""
    clean, bad, found = count_cells(frame[column], column)
    problems.extend(found)
    return clean, bad


def parse_times(raw: pd.Series, timezone: str) -> tuple[pd.Series, np.ndarray, np.ndarray]:
    """ISO 8601 dates or date-times -> (stored text, has_time, parse failed); see :mod:`contentlab.timeparse`.

    Date-times are stored in UTC; those without an offset are read as the
    workspace's local time. Dates alone are kept as dates: their hour is unknown.
    """
    parsed = parse_datetimes(raw, timezone)
    stored = pd.Series(parsed.stored, index=raw.index, dtype=object)
    return stored, parsed.has_time, parsed.failed | parsed.empty


READ_STEPS = 5


def read_history(path: Path | str, mapping_path: Path | str | None = None, timezone: str = "UTC", *,
                 progress=None) -> History:
    """Read, map and validate one export. Raises only for file-level problems.

    ``progress``, if given, is a tqdm-like bar advanced once per step
    (:data:`READ_STEPS` steps in all).
    """

    def step(name: str) -> None:
        if progress is not None:
            progress.set_postfix_str(name, refresh=False)
            progress.update(1)
    path = Path(path)
    file = str(path)
    mapping = load_mapping(Path(mapping_path) if mapping_path else None)
    frame, ignored = read_table(path, mapping)
    missing = [c for c in REQUIRED if c not in frame.columns]
    has_outcome = any(c in frame.columns for c in OUTCOMES + ENGAGEMENT_PARTS)
    if missing or not has_outcome:
        need = list(missing)
        if not has_outcome:
            need.append("an outcome (clicks, engagements, or likes/comments/shares/saves)")
        raise ContentlabError(
            f"{file}: row {header_row(frame)} (header), missing required column(s): {', '.join(need)}. "
            f"The file has: {', '.join(frame.columns)}. Rename them, or pass --map MAP.toml."
        )
    step("read")
    n = len(frame)
    rows = frame.index.to_numpy(dtype=np.int64)  # line numbers; the header is line 1
    found: list[tuple[int, str, str]] = []

    post_id = frame["post_id"].str.strip()
    for i in np.flatnonzero((post_id == "").to_numpy()):
        found.append((i, "post_id", "is empty; every post needs its own id"))

    found += long_cells(post_id, "post_id", MAX_ID_CHARS, "an id")
    times = parse_datetimes(frame["published_at"], timezone)
    published = pd.Series(times.stored, index=frame.index, dtype=object)
    has_time = times.has_time
    for i in np.flatnonzero(times.empty):
        found.append((i, "published_at", "is empty; every post needs its date"))
    for i in np.flatnonzero(times.failed):
        found.append((i, "published_at", times.errors[i]))

    step("dates")
    headline_raw = frame["headline"]
    headline = headline_raw.map(clean_headline)
    for i in np.flatnonzero((headline == "").to_numpy()):
        found.append((i, "headline", "is empty after removing markup"))
    lengths = headline.str.len().to_numpy()
    for i in np.flatnonzero(lengths > MAX_HEADLINE_CHARS):
        found.append((i, "headline", f"has {lengths[i]} characters; the limit is {MAX_HEADLINE_CHARS}"))

    step("headlines")
    impressions, bad_impressions = _count_column(frame, "impressions", found)
    out = {"impressions": impressions}
    invalid = {"impressions": bad_impressions}
    for column in ["clicks", "engagements"] + [c for c in ENGAGEMENT_PARTS if c in frame.columns]:
        if column in frame.columns:
            out[column], invalid[column] = _count_column(frame, column, found)
    engagements = None
    parts = [c for c in ENGAGEMENT_PARTS if c in frame.columns]
    if "engagements" in frame.columns:
        engagements, bad_engagements = out["engagements"], invalid["engagements"]
    elif parts:
        engagements = sum(out[c] for c in parts)
        bad_engagements = np.logical_or.reduce([invalid[c] for c in parts])
    clicks = out.get("clicks")
    # Compared only where both cells are valid counts, so one bad cell gives one problem.
    if clicks is not None:
        for i in np.flatnonzero((clicks > impressions) & ~invalid["clicks"] & ~bad_impressions):
            found.append((i, "clicks", f"{clicks[i]} clicks is more than its {impressions[i]} impressions; check the "
                                      "two columns are not swapped"))
    if engagements is not None:
        name = "engagements" if "engagements" in frame.columns else "+".join(parts)
        for i in np.flatnonzero((engagements > impressions) & ~bad_engagements & ~bad_impressions):
            found.append((i, name, f"{engagements[i]} engagements is more than its {impressions[i]} impressions; "
                                  "check the two columns are not swapped"))

    cost = np.full(n, np.nan)
    if "cost" in frame.columns:
        raw_cost = frame["cost"].str.strip()
        parsed = pd.to_numeric(raw_cost, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
        given = (raw_cost != "").to_numpy()
        bad_cost = given & ~np.isfinite(parsed)
        for i in np.flatnonzero(bad_cost):
            found.append((i, "cost", f"'{_short(raw_cost.iat[i])}' is not a finite number; write the cost as a plain "
                                     "number without a currency sign (e.g. 12.50), or leave the cell empty"))
        neg = given & np.isfinite(parsed) & (parsed < 0)
        for i in np.flatnonzero(neg):
            found.append((i, "cost", f"{_short(raw_cost.iat[i])} is negative; a cost cannot be below 0"))
        cost = np.where(given & ~bad_cost & ~neg, parsed, np.nan)

    clean = pd.DataFrame(
        {
            "post_id": post_id,
            "published_at": published,
            "has_time": has_time.astype(np.int64),
            "headline": headline,
            "impressions": impressions,
            "clicks": clicks if clicks is not None else None,
            "engagements": engagements if engagements is not None else None,
        }
    )
    for column, limit, noun in (("channel", MAX_NAME_CHARS, "a channel"), ("experiment_id", MAX_ID_CHARS, "an id"),
                                ("image_id", MAX_ID_CHARS, "an id")):
        if column in frame.columns:
            found += long_cells(frame[column].str.strip(), column, limit, noun)
    if may_hold_controls(frame):
        for column in ["post_id", "headline"] + OPTIONAL_TEXT:
            if column in frame.columns:
                found += control_cells(frame[column], column)
    for column in OPTIONAL_TEXT:
        clean[column] = frame[column].str.strip().replace("", None) if column in frame.columns else None
    clean["cost"] = cost
    clean["row"] = rows

    step("counts")
    # The same post_id twice: fine when identical, a problem when the values differ.
    bad_rows = np.zeros(n, dtype=bool)
    for i, _, _ in found:
        bad_rows[i] = True
    dup = clean["post_id"].duplicated(keep=False).to_numpy() & ~bad_rows & (post_id != "").to_numpy()
    if dup.any():
        value_cols = [c for c in STORED if c != "post_id"]
        positions = np.flatnonzero(dup)
        # Compare every repeat with the first valid row of its post_id, column by column.
        ids = clean["post_id"].to_numpy(dtype=object)[positions]
        first_of = {}
        for pos, pid in zip(positions, ids):
            first_of.setdefault(pid, pos)
        ref = np.array([first_of[pid] for pid in ids])
        differs = np.zeros(len(positions), dtype=bool)
        for column in value_cols:
            values = clean[column].to_numpy(dtype=object)
            a, b = values[positions], values[ref]
            a_missing, b_missing = pd.isna(a), pd.isna(b)
            same = (a_missing & b_missing) | (~a_missing & ~b_missing & (a == b))
            differs |= ~same
        for pos, ref_pos, pid in zip(positions[differs], ref[differs], ids[differs]):
            found.append((pos, "post_id", f"'{_short(pid)}' appears again with different values (first at row {rows[ref_pos]})"))
        # Identical repeats are dropped quietly below.

    step("duplicates")
    problems = [Problem(file, int(rows[i]), col, reason) for i, col, reason in found]
    problems.sort(key=lambda p: (p.row, p.column))
    bad_rows = np.zeros(n, dtype=bool)
    for i, _, _ in found:
        bad_rows[i] = True
    good = clean.loc[~bad_rows].drop_duplicates("post_id", keep="first")
    notes = times.clock_notes(lambda positions: f"{file}: {rows_text(rows[positions])}, column 'published_at'",
                              among=clean.index.isin(good.index))  # the rows stored
    rejected = frame.loc[bad_rows].copy()
    rejected.insert(0, "row", rows[bad_rows], allow_duplicates=True)
    reasons: dict[int, list[str]] = {}
    for p in problems:
        reasons.setdefault(p.row, []).append(f"{p.column}: {p.reason}")
    rejected["problems"] = ["; ".join(reasons[r]) for r in rejected["row"]]
    return History(
        posts=good[STORED + ["row"]].reset_index(drop=True),
        rejected=rejected.reset_index(drop=True),
        problems=problems,
        rows_read=n,
        ignored_columns=ignored,
        notes=notes,
    )


def format_problems(problems: list[Problem], limit: int = 20) -> str:
    """Up to ``limit`` problems, one a line, then how many more."""
    lines = [str(p) for p in problems[:limit]]
    if len(problems) > limit:
        lines.append(f"... and {len(problems) - limit} more problem(s)")
    return "\n".join(lines)
