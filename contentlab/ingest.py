"""Read post-history exports, map their columns and validate every row.

Nothing here touches the workspace: :func:`read_history` returns the clean
rows and a list of :class:`Problem` records (file, row, column, reason), and
the caller decides whether to write anything.
"""

from __future__ import annotations

import codecs
import csv
import gzip
import io
import math
import re
import tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import ContentlabError
from .features import clean_headline

REQUIRED = ["post_id", "published_at", "headline", "impressions"]
OUTCOMES = ["clicks", "engagements"]
ENGAGEMENT_PARTS = ["likes", "comments", "shares", "saves"]
OPTIONAL_TEXT = ["channel", "body", "experiment_id", "image_id"]
OPTIONAL_NUMBER = ["cost"]
KNOWN = REQUIRED + OUTCOMES + ENGAGEMENT_PARTS + OPTIONAL_TEXT + OPTIONAL_NUMBER
MAX_HEADLINE_CHARS = 1000
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


# ------------------------------------------------------------------ reading

def read_bytes(path: Path) -> tuple[bytes, str]:
    """File bytes (gunzipped, BOM removed) and their encoding: UTF-8 if they are valid UTF-8, else cp1252.

    The bytes go to pandas as they are, which needs far less memory on a large
    export than decoding the whole file into one string first.
    """
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise ContentlabError(f"{path}: no such file. Check the path and try again.") from None
    except IsADirectoryError:
        raise ContentlabError(f"{path}: is a folder; give the CSV file inside it.") from None
    if raw[:2] == b"\x1f\x8b":
        try:
            raw = gzip.decompress(raw)
        except (OSError, EOFError) as exc:
            raise ContentlabError(f"{path}: looks gzip-compressed but cannot be read ({exc}).") from None
    if raw.startswith(b"\xef\xbb\xbf"):
        return raw[3:], "utf-8"
    return raw, "utf-8" if _is_utf8(raw) else "cp1252"


def _is_utf8(raw: bytes, block: int = 1 << 20) -> bool:
    """Whether ``raw`` decodes as UTF-8, checked a megabyte at a time (no full-size copy)."""
    decoder = codecs.getincrementaldecoder("utf-8")()
    view = memoryview(raw)
    try:
        for start in range(0, len(raw), block):
            decoder.decode(view[start:start + block], final=False)
        decoder.decode(b"", final=True)
    except UnicodeDecodeError:
        return False
    return True


def read_text(path: Path) -> str:
    """File text: UTF-8 (with or without BOM) or, failing that, cp1252.

    The five bytes cp1252 leaves undefined become U+FFFD rather than an error.
    """
    raw, encoding = read_bytes(path)
    return raw.decode(encoding, errors="replace")


def sniff_delimiter(text: str) -> str:
    """Comma, semicolon or tab: the one the header row uses most (outside quotes).

    The header decides because headlines in the rows below are free text full
    of commas and semicolons; csv.Sniffer breaks a tie.
    """
    header = text.split("\n", 1)[0]
    outside = re.sub(r'"[^"]*"', "", header)
    counts = {d: outside.count(d) for d in (",", ";", "\t")}
    best = max(counts.values())
    winners = [d for d, c in counts.items() if c == best]
    if best > 0 and len(winners) == 1:
        return winners[0]
    sample = "\n".join(text.splitlines()[:20])
    try:
        return csv.Sniffer().sniff(sample, delimiters=",;\t").delimiter
    except csv.Error:
        return winners[0] if best > 0 else ","


def load_mapping(path: Path | None) -> dict[str, str]:
    """Read a TOML column map: ``[columns]`` with ``our_name = "Their Column"``."""
    if path is None:
        return {}
    try:
        data = tomllib.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ContentlabError(f"{path}: no such mapping file.") from None
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
    """All cells as text, columns renamed to contentlab's names."""
    raw, encoding = read_bytes(path)
    if not raw.strip():
        raise ContentlabError(f"{path}: the file is empty. Export the post history with a header row.")
    delimiter = sniff_delimiter(raw[:65536].decode(encoding, errors="replace"))
    try:
        frame = pd.read_csv(
            io.BytesIO(raw),
            encoding=encoding,
            encoding_errors="replace",
            sep=delimiter,
            dtype=str,
            keep_default_na=False,
            skipinitialspace=True,
            skip_blank_lines=False,  # so that row numbers stay line numbers
            engine="c",
        )
    except (pd.errors.ParserError, ValueError) as exc:
        detail = " ".join(str(exc).split())
        raise ContentlabError(
            f"{path}: cannot be read as CSV ({detail}). A row with more cells than the header usually "
            "means a cell holds the delimiter without quotes around it."
        ) from None
    frame.columns = [str(c).strip() for c in frame.columns]
    frame.index = pd.RangeIndex(2, len(frame) + 2)  # file row numbers; the header is row 1
    frame = frame.fillna("")
    if len(frame.columns):
        blank = (frame == "").all(axis=1)
        if blank.any():
            frame = frame.loc[~blank]
    rename = {}
    for ours, theirs in mapping.items():
        if theirs not in frame.columns:
            raise ContentlabError(
                f"{path}: the map says {ours} = \"{theirs}\" but the file has no column \"{theirs}\". "
                f"Its columns are: {', '.join(frame.columns)}."
            )
        rename[theirs] = ours
    frame = frame.rename(columns=rename)
    lowered = {c: c.lower() for c in frame.columns if c not in rename.values() and c.lower() in KNOWN}
    frame = frame.rename(columns=lowered)
    repeated = sorted({c for c in frame.columns if list(frame.columns).count(c) > 1})
    if repeated:
        raise ContentlabError(
            f"{path}: row 1 (header), more than one column would be read as {', '.join(repeated)}. "
            "Rename or remove the extra column, or map only one of them."
        )
    ignored = [c for c in frame.columns if c not in KNOWN]
    return frame, ignored


# --------------------------------------------------------------- validation

def _count_column(frame: pd.DataFrame, column: str, rows: np.ndarray, problems: list, file: str):
    """Parse whole non-negative counts; report every cell that is not one."""
    raw = frame[column].str.strip()
    values = pd.to_numeric(raw, errors="coerce")
    bad = np.zeros(len(frame), dtype=bool)
    empty = (raw == "").to_numpy()
    nonnum = values.isna().to_numpy() & ~empty
    lower = raw.str.lower()
    named_nan = lower.isin(["nan", "-nan", "+nan"]).to_numpy()
    infinite = np.isinf(values.to_numpy(dtype=float, na_value=np.nan))
    finite_vals = values.to_numpy(dtype=float, na_value=np.nan)
    negative = np.nan_to_num(finite_vals, nan=0.0, posinf=0.0, neginf=0.0) < 0
    fractional = np.isfinite(finite_vals) & (np.floor(finite_vals) != finite_vals)
    # Above 2**53 a float no longer holds every whole number; no post has that many.
    too_large = np.isfinite(finite_vals) & (finite_vals > 2.0**53)
    for i in np.flatnonzero(too_large):
        problems.append((i, column, f"{_short(raw.iat[i])} is too large to be a count"))
    for i in np.flatnonzero(empty):
        problems.append((i, column, "is empty; write 0 if there were none"))
    for i in np.flatnonzero(named_nan | (nonnum & ~named_nan)):
        cell = raw.iat[i]
        reason = "is NaN; write the real count" if named_nan[i] else f"'{_short(cell)}' is not a number"
        problems.append((i, column, reason))
    for i in np.flatnonzero(infinite):
        problems.append((i, column, f"'{_short(raw.iat[i])}' is infinite"))
    for i in np.flatnonzero(negative & ~infinite):
        problems.append((i, column, f"{raw.iat[i]} is negative; counts cannot be below 0"))
    for i in np.flatnonzero(fractional & ~negative):
        problems.append((i, column, f"{raw.iat[i]} is fractional; counts must be whole numbers"))
    bad = empty | nonnum | named_nan | infinite | negative | fractional | too_large
    clean = np.where(bad, 0, np.nan_to_num(finite_vals, nan=0, posinf=0, neginf=0)).astype(np.int64)
    return clean, bad


def _short(text: str, limit: int = 40) -> str:
    return text if len(text) <= limit else text[: limit - 1] + "…"


def parse_times(raw: pd.Series, timezone: str) -> tuple[pd.Series, np.ndarray, np.ndarray]:
    """ISO 8601 dates or date-times -> (stored text, has_time, parse failed).

    Date-times are stored in UTC; those without an offset are read as the
    workspace's local time. Dates alone are kept as dates: their hour is unknown.
    """
    text = raw.str.strip()
    date_only = text.str.fullmatch(r"\d{4}-\d{2}-\d{2}").to_numpy()
    stored = pd.Series([""] * len(text), index=text.index, dtype=object)
    failed = np.zeros(len(text), dtype=bool)
    if date_only.any():
        parsed = pd.to_datetime(text[date_only], format="%Y-%m-%d", errors="coerce")
        ok = parsed.notna().to_numpy()
        idx = np.flatnonzero(date_only)
        failed[idx[~ok]] = True
        stored.iloc[idx[ok]] = parsed[ok].dt.strftime("%Y-%m-%d").to_numpy()
    rest = np.flatnonzero(~date_only)
    if len(rest):
        sub = text.iloc[rest]
        has_offset = sub.str.contains(r"(?:[zZ]|[+-]\d{2}:?\d{2})$", regex=True).to_numpy()
        iso_like = sub.str.match(r"^\d{4}-\d{2}-\d{2}[T ]\d{1,2}:\d{2}").to_numpy()
        out = np.full(len(sub), "", dtype=object)
        bad = ~iso_like
        if (iso_like & has_offset).any():
            sel = iso_like & has_offset
            p = pd.to_datetime(sub[sel], format="ISO8601", utc=True, errors="coerce")
            okm = p.notna().to_numpy()
            vals = np.full(sel.sum(), "", dtype=object)
            vals[okm] = p[okm].dt.strftime("%Y-%m-%dT%H:%M:%S+00:00").to_numpy()
            out[sel] = vals
            bad[np.flatnonzero(sel)[~okm]] = True
        if (iso_like & ~has_offset).any():
            sel = iso_like & ~has_offset
            p = pd.to_datetime(sub[sel], format="ISO8601", errors="coerce")
            okm = p.notna().to_numpy()
            vals = np.full(sel.sum(), "", dtype=object)
            if okm.any():
                local = p[okm].dt.tz_localize(timezone, ambiguous="NaT", nonexistent="shift_forward")
                okl = local.notna().to_numpy()
                v = np.full(okm.sum(), "", dtype=object)
                v[okl] = local[okl].dt.tz_convert("UTC").dt.strftime("%Y-%m-%dT%H:%M:%S+00:00").to_numpy()
                # An hour that happens twice at the DST change is read as its first occurrence.
                if (~okl).any():
                    again = p[okm][~okl].dt.tz_localize(timezone, ambiguous=True, nonexistent="shift_forward")
                    v[~okl] = again.dt.tz_convert("UTC").dt.strftime("%Y-%m-%dT%H:%M:%S+00:00").to_numpy()
                vals[okm] = v
            out[sel] = vals
            bad[np.flatnonzero(sel)[~okm]] = True
        stored.iloc[rest] = out
        failed[rest] = bad
    has_time = (~date_only) & ~failed
    return stored, has_time, failed


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
            f"{file}: row 1 (header), missing required column(s): {', '.join(need)}. "
            f"The file has: {', '.join(frame.columns)}. Rename them, or pass --map MAP.toml."
        )
    step("read")
    n = len(frame)
    rows = frame.index.to_numpy(dtype=np.int64)  # line numbers; the header is line 1
    found: list[tuple[int, str, str]] = []

    post_id = frame["post_id"].str.strip()
    for i in np.flatnonzero((post_id == "").to_numpy()):
        found.append((i, "post_id", "is empty; every post needs its own id"))

    published, has_time, failed = parse_times(frame["published_at"], timezone)
    for i in np.flatnonzero(failed):
        cell = frame["published_at"].iat[i]
        found.append((i, "published_at", f"'{_short(cell)}' is not an ISO 8601 date or date-time (e.g. 2026-03-14 or 2026-03-14T09:30:00+01:00)"))

    step("dates")
    headline_raw = frame["headline"]
    headline = headline_raw.map(clean_headline)
    for i in np.flatnonzero((headline == "").to_numpy()):
        found.append((i, "headline", "is empty after removing markup"))
    lengths = headline.str.len().to_numpy()
    for i in np.flatnonzero(lengths > MAX_HEADLINE_CHARS):
        found.append((i, "headline", f"has {lengths[i]} characters; the limit is {MAX_HEADLINE_CHARS}"))

    step("headlines")
    impressions, bad_impressions = _count_column(frame, "impressions", rows, found, file)
    out = {"impressions": impressions}
    invalid = {"impressions": bad_impressions}
    for column in ["clicks", "engagements"] + [c for c in ENGAGEMENT_PARTS if c in frame.columns]:
        if column in frame.columns:
            out[column], invalid[column] = _count_column(frame, column, rows, found, file)
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
            found.append((i, "clicks", f"{clicks[i]} clicks is more than its {impressions[i]} impressions"))
    if engagements is not None:
        name = "engagements" if "engagements" in frame.columns else "+".join(parts)
        for i in np.flatnonzero((engagements > impressions) & ~bad_engagements & ~bad_impressions):
            found.append((i, name, f"{engagements[i]} engagements is more than its {impressions[i]} impressions"))

    cost = np.full(n, np.nan)
    if "cost" in frame.columns:
        raw_cost = frame["cost"].str.strip()
        parsed = pd.to_numeric(raw_cost, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
        given = (raw_cost != "").to_numpy()
        bad_cost = given & ~np.isfinite(parsed)
        for i in np.flatnonzero(bad_cost):
            found.append((i, "cost", f"'{_short(raw_cost.iat[i])}' is not a finite number"))
        neg = given & np.isfinite(parsed) & (parsed < 0)
        for i in np.flatnonzero(neg):
            found.append((i, "cost", f"{raw_cost.iat[i]} is negative"))
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
    )


def format_problems(problems: list[Problem], limit: int = 20) -> str:
    """Up to ``limit`` problems, one a line, then how many more."""
    lines = [str(p) for p in problems[:limit]]
    if len(problems) > limit:
        lines.append(f"... and {len(problems) - limit} more problem(s)")
    return "\n".join(lines)
