"""One reader per kind of input file, and the checks every way in shares.

* :func:`read_cells` reads any CSV the user gives (post history, drafts,
  results) into text cells, refusing what would otherwise be read wrongly: a
  damaged UTF-16 file, NUL bytes, a header that names a column twice, a row with more
  cells than the header, a quote that never closes. Row numbers are physical
  lines as a text editor shows them (a quoted headline over two lines moves
  the rows below it down).
* :func:`read_drafts` / :func:`prepare_drafts`: the drafts format (``headline``;
  optional ``channel``, ``publish_at`` or ``time``, ``group``, ``arm``), used by
  ``score``, ``experiment new``, ``report --drafts`` and the Python API alike.
* :func:`read_results` / :func:`check_results`: the results format (``arm``,
  ``impressions``, ``clicks``; optional ``at``, ``event_id``), used by
  ``record`` and :func:`contentlab.experiments.record_results`.
* :func:`count_cells`: whole non-negative counts, the same rules for an export
  and for results.

Limits (also in the README): ids (post, experiment, image, event) up to
:data:`MAX_ID_CHARS` characters, channel and group names up to
:data:`MAX_NAME_CHARS`, headlines up to :data:`MAX_HEADLINE_CHARS` in a history and
:data:`MAX_DRAFT_CHARS` in drafts, counts up to
2^53 (the largest whole number a float holds exactly).
"""

from __future__ import annotations

import codecs
import csv
import gzip
import hashlib
import io
import math
import re
import unicodedata
import zlib
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import CONTROL_CHARS, ContentlabError
from .timeparse import parse_datetimes

MAX_ID_CHARS = 200
MAX_NAME_CHARS = 100
MAX_HEADLINE_CHARS = 1000  # a post in a history
MAX_DRAFT_CHARS = 300  # a draft to score or test: a headline, not body text
MAX_COUNT = 2**53
PUBLISH_ALIASES = ("publish_at", "published_at", "at", "time")
DRAFT_COLUMNS = ("headline", "channel", "publish_at", "group", "arm")
RESULT_COLUMNS = ("arm", "impressions", "clicks", "at", "event_id")

__all__ = [
    "MAX_COUNT",
    "MAX_DRAFT_CHARS",
    "MAX_HEADLINE_CHARS",
    "MAX_ID_CHARS",
    "MAX_NAME_CHARS",
    "check_results",
    "control_cells",
    "count_cells",
    "file_digest",
    "known_names",
    "long_cells",
    "prepare_drafts",
    "read_bytes",
    "read_cells",
    "read_drafts",
    "read_results",
    "short",
    "sniff_delimiter",
    "unused_columns",
]


def short(text: str, limit: int = 40) -> str:
    """``text`` cut to ``limit`` characters for a message."""
    text = str(text)
    return text if len(text) <= limit else text[: limit - 1] + "…"


# ------------------------------------------------------------------ bytes and structure

def rows_text(rows: Sequence[int], limit: int = 8) -> str:
    """``row 5`` or ``rows 5, 9, 12 and 3 more``: file lines named in a message."""
    rows = [int(r) for r in rows]
    shown = ", ".join(str(r) for r in rows[:limit])
    more = f" and {len(rows) - limit} more" if len(rows) > limit else ""
    return ("row " if len(rows) == 1 else "rows ") + shown + more


def file_bytes(path: Path, instead_of_a_folder: str) -> bytes:
    """A file's bytes, or one clear line for every input file the tool reads: missing, a folder, unreadable."""
    try:
        return path.read_bytes()
    except FileNotFoundError:
        raise ContentlabError(f"{path}: no such file. Check the path and try again.") from None
    except IsADirectoryError:
        raise ContentlabError(f"{path}: is a folder; give {instead_of_a_folder}.") from None
    except PermissionError:
        raise ContentlabError(f"{path}: cannot be read (permission denied); ask for read access to it, or copy it "
                              "somewhere you may read and give that copy.") from None
    except OSError as exc:  # a symbolic-link loop, a name too long, a device that fails to read...
        raise ContentlabError(f"{path}: cannot be read ({exc.strerror or exc}); check the path, or copy the file "
                              "somewhere plain and give that copy.") from None


def read_bytes(path: str | Path) -> tuple[bytes, str]:
    """File bytes (gunzipped, BOM removed) and their encoding: UTF-8 if they are valid UTF-8, else cp1252.

    A UTF-16 or UTF-32 file (a spreadsheet's "Unicode Text" export) is
    recognised by its byte-order mark, or by the NUL byte beside every ASCII
    letter, and read as text re-encoded to UTF-8; one that does not decode
    cleanly is refused with a way to fix it, never read garbled.
    """
    path = Path(path)
    raw = file_bytes(path, "the CSV file inside it")
    if raw[:2] == b"\x1f\x8b":
        try:
            raw = gzip.decompress(raw)
        except (OSError, EOFError, zlib.error) as exc:  # zlib.error: a damaged compressed block
            raise ContentlabError(
                f"{path}: looks gzip-compressed but cannot be read ({exc}); the file is damaged or was cut short. "
                "Copy or download it again, or give the uncompressed CSV."
            ) from None
    kind = _not_a_csv(raw)
    if kind:
        raise ContentlabError(f"{path}: is {kind}, not a CSV file; save or export it as CSV UTF-8 and try again.")
    if raw.startswith(b"\xef\xbb\xbf"):
        return raw[3:], "utf-8"
    wide = _wide_encoding(raw)
    if wide:
        raw = _from_wide(path, raw, wide)
    nul = raw.find(b"\x00")
    if nul >= 0:
        line = raw.count(b"\n", 0, nul) + 1
        raise ContentlabError(
            f"{path}: row {line} holds a NUL byte (\\0), which no CSV export contains; the file may be damaged "
            "or not a CSV file. Export it again as CSV."
        )
    bad = _first_non_utf8(raw)
    if bad is None:
        return raw, "utf-8"
    mixed = _UTF8_TEXT.search(raw)
    if mixed:  # read as cp1252, its UTF-8 rows would be garbled ('Café' as 'CafÃ©') without a word
        line = raw.count(b"\n", 0, bad) + 1
        other = raw.count(b"\n", 0, mixed.start()) + 1
        near = raw[max(0, mixed.start() - 12):mixed.end() + 12].decode("utf-8", errors="replace")
        sample = short(" ".join(near.replace("\ufffd", "").split()), 30)
        raise ContentlabError(
            f"{path}: mixes two encodings: row {other} holds UTF-8 text ('{sample}') but row {line} holds a byte "
            f"(0x{raw[bad]:02X}) that is not UTF-8, so either way part of its text would be read garbled. Correct "
            f"row {line} and save the file as CSV UTF-8 (in a spreadsheet: Save As, 'CSV UTF-8'), then try again."
        )
    unused = _CP1252_UNUSED.search(raw)
    if unused:  # neither UTF-8 nor cp1252: read as cp1252 its text would be silently garbled
        line = raw.count(b"\n", 0, unused.start()) + 1
        raise ContentlabError(
            f"{path}: row {line} holds a byte (0x{raw[unused.start()]:02X}) that neither UTF-8 nor Windows-1252 text "
            "uses, so the file is in another encoding (Shift-JIS, GBK, Mac Roman, ...) and its text would be read "
            "garbled. Save it as CSV UTF-8 (in a spreadsheet: Save As, 'CSV UTF-8') and try again."
        )
    return raw, "cp1252"


# The five byte values Windows-1252 leaves undefined: no cp1252 (or latin-1) text file holds them.
_CP1252_UNUSED = re.compile(rb"[\x81\x8d\x8f\x90\x9d]")


# Leading bytes of files people pick by mistake instead of the CSV (their formats' published signatures).
_SIGNATURES = (
    (b"PK\x03\x04", "a ZIP archive (an Excel .xlsx workbook is one too)"),
    (b"PK\x05\x06", "an empty ZIP archive"),
    (b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1", "an Excel 97-2003 (.xls) workbook or another Office file"),
    (b"%PDF-", "a PDF document"),
    (b"SQLite format 3\x00", "an SQLite database"),
    (b"\x89PNG\r\n\x1a\n", "a PNG image"),
    (b"\xff\xd8\xff", "a JPEG image"),
    (b"GIF8", "a GIF image"),
    (b"BZh", "a bzip2-compressed file (contentlab reads .gz only)"),
    (b"\xfd7zXZ\x00", "an xz-compressed file (contentlab reads .gz only)"),
    (b"7z\xbc\xaf\x27\x1c", "a 7-Zip archive"),
)

# Text files that are not CSV: by their first non-blank characters (lower case).
_TEXT_SIGNATURES = (
    (b"<!doctype html", "a web page (HTML)"),
    (b"<html", "a web page (HTML)"),
    (b"<?xml", "an XML file"),
    (b"{", "JSON"),
    (b"[{", "JSON"),
    (b"[\n", "JSON"),
    (b"[]", "JSON"),
)


def _not_a_csv(raw: bytes) -> str | None:
    """What a file is when its first bytes say it is a known non-CSV format, else None."""
    kind = next((kind for magic, kind in _SIGNATURES if raw.startswith(magic)), None)
    if kind:
        return kind
    head = raw[:64].removeprefix(b"\xef\xbb\xbf").lstrip().lower()
    head = head[:1] + head[1:].lstrip(b" \t\r") if head.startswith(b"[") else head
    return next((kind for magic, kind in _TEXT_SIGNATURES if head.startswith(magic)), None)


def _wide_encoding(raw: bytes) -> str | None:
    """The Python codec of a UTF-32 or UTF-16 file (by its byte-order mark, else by where its NUL bytes sit), or None."""
    if raw[:4] in (b"\xff\xfe\x00\x00", b"\x00\x00\xfe\xff"):
        return "utf-32"
    if raw[:2] in (b"\xff\xfe", b"\xfe\xff"):
        return "utf-16"
    head = raw[:200]
    if len(head) >= 4 and head.count(b"\x00") * 3 >= len(head):
        # ASCII text in UTF-16: the NUL is the high byte, second in little-endian order, first in big-endian.
        odd = head[1::2].count(b"\x00")
        return "utf-16-le" if odd >= head[0::2].count(b"\x00") else "utf-16-be"
    return None


def _from_wide(path: Path, raw: bytes, codec: str) -> bytes:
    """UTF-8 bytes of a UTF-16 or UTF-32 file; refused, naming the row, where it does not decode cleanly."""
    try:
        text = raw.decode(codec)
    except UnicodeDecodeError as exc:
        line = raw[:exc.start].decode(codec, errors="replace").count("\n") + 1
        name = codec.upper().replace("-LE", "").replace("-BE", "")
        raise ContentlabError(
            f"{path}: reads as {name} text up to row {line}, where it holds bytes that are not {name} (the file may "
            "be cut short or damaged); save it again as CSV UTF-8 (in a spreadsheet: Save As, 'CSV UTF-8') and try "
            "again."
        ) from None
    return text.removeprefix("\ufeff").encode("utf-8")


def _first_non_utf8(raw: bytes, block: int = 1 << 20) -> int | None:
    """Offset of the first byte that is not UTF-8 (None when all of ``raw`` is), checked a megabyte at a time
    (no full-size copy)."""
    decoder = codecs.getincrementaldecoder("utf-8")()
    view = memoryview(raw)
    start = 0
    try:
        for start in range(0, len(raw), block):
            decoder.decode(view[start:start + block], final=False)
        start = len(raw)
        decoder.decode(b"", final=True)
    except UnicodeDecodeError as exc:
        pending = len(decoder.getstate()[0])  # bytes of an unfinished sequence carried over from the block before
        return max(0, start - pending + exc.start) if start < len(raw) else max(0, len(raw) - pending)
    return None


# UTF-8 sequences of accented Latin letters, punctuation and symbols (U+00A0-U+017F, U+2000-U+20BF) and emoji:
# found in a file that is not UTF-8 as a whole, they mean rows in two encodings (read as cp1252 they would be
# 'Ã©', 'â€”'). Read as cp1252 text they are an accented capital followed by a symbol, which text hardly holds.
_UTF8_TEXT = re.compile(rb"(?:\xc2[\xa0-\xbf]|[\xc3-\xc5][\x80-\xbf]|\xe2[\x80-\x82][\x80-\xbf]"
                        rb"|\xf0\x9f[\x80-\xbf][\x80-\xbf])+")


def file_digest(raw: bytes) -> str:
    """Digest of a file's whole content: two files with the same bytes are the same batch."""
    return hashlib.blake2b(raw, digest_size=16).hexdigest()


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


def read_cells(path: str | Path, what: str = "file") -> pd.DataFrame:
    """Every cell of a CSV as text (leading spaces dropped; callers strip what they compare); the index is each row's first physical line (the header is line 1).

    ``frame.attrs`` holds ``source`` (the path as given) and ``digest`` (of the
    whole content). Blank rows are dropped (their line numbers stay skipped).
    Raises :class:`ContentlabError` naming the line for anything the file's
    structure gets wrong; ``what`` names the kind of file in the message.
    """
    whole, encoding = read_bytes(path)
    if not whole.strip():
        raise ContentlabError(f"{path}: the file is empty; a {what} needs a header row and at least one row.")
    raw, delimiter, skipped = _excel_separator_line(whole, encoding)
    if delimiter is None:
        delimiter = sniff_delimiter(raw[:65536].decode(encoding, errors="replace"))
    if not raw.strip():
        raise ContentlabError(f"{path}: holds only a 'sep=' line; a {what} needs a header row and at least one row.")
    try:
        cells = pd.read_csv(
            io.BytesIO(raw), encoding=encoding, encoding_errors="replace", sep=delimiter, header=None,
            dtype=str, keep_default_na=False, skipinitialspace=True, skip_blank_lines=False, engine="c",
        )
    except pd.errors.ParserError as exc:
        raise ContentlabError(_structure_problem(path, raw, encoding, delimiter, str(exc))) from None
    except (ValueError, UnicodeError) as exc:
        raise ContentlabError(f"{path}: cannot be read as CSV ({' '.join(str(exc).split())}).") from None
    header = [str(c).strip() for c in cells.iloc[0].tolist()]
    header = [h if h else f"(unnamed column {j + 1})" for j, h in enumerate(header)]
    seen: dict[str, int] = {}
    for j, name in enumerate(header):
        key = name.casefold()
        if key in seen:
            raise ContentlabError(
                f"{path}: row {1 + skipped} (header), column '{name}' appears twice (columns {seen[key] + 1} and {j + 1}); "
                "rename or remove one of them."
            )
        seen[key] = j
    frame = cells.iloc[1:].reset_index(drop=True)
    frame.columns = header
    frame.index = pd.Index(_row_lines(raw, encoding, delimiter, len(cells)), dtype=np.int64)[1:] + skipped
    frame = frame.fillna("")
    if len(frame.columns):
        blank = (frame == "").all(axis=1)
        if blank.any():
            frame = frame.loc[~blank.to_numpy()]
    _check_one_delimiter(path, frame, delimiter)
    frame.attrs["source"] = str(path)
    frame.attrs["digest"] = file_digest(whole)
    frame.attrs["header_row"] = 1 + skipped
    frame.attrs["controls"] = _CONTROL_BYTES.search(raw) is not None
    return frame


_DELIMITER_NAMES = {",": "commas", ";": "semicolons", "\t": "tabs"}


def _check_one_delimiter(path, frame: pd.DataFrame, delimiter: str) -> None:
    """Refuse a file whose rows use another delimiter than its header (all of a row's cells land in its first).

    Read as it is, such a row would be reported as empty dates and counts, which sends the user to the
    wrong fix.
    """
    width = frame.shape[1]
    if width < 2 or frame.empty:
        return
    lone = frame.iloc[:, 1].to_numpy() == ""  # the second cell first: on a good file this settles it
    if not lone.any():
        return
    if width > 2:
        lone &= frame.iloc[:, 2:].eq("").all(axis=1).to_numpy()
    first = frame.iloc[:, 0].astype(str)
    for other, name in _DELIMITER_NAMES.items():
        if other == delimiter:
            continue
        split = lone & (first.str.count(re.escape(other)).to_numpy() >= width - 1)
        if split.any():
            line = int(frame.index[np.flatnonzero(split)[0]])
            raise ContentlabError(
                f"{path}: row {line} separates its cells with {name} but the header row uses "
                f"{_DELIMITER_NAMES[delimiter]}; export the file again with one delimiter throughout."
            )


def header_row(frame: pd.DataFrame) -> int:
    """The file line of the header of a frame from :func:`read_cells` (2 after a 'sep=' line)."""
    return int(frame.attrs.get("header_row", 1))


_SEP_LINE = re.compile(rb'^"?sep=(.)"?[ \t]*\r?\n')


def _excel_separator_line(raw: bytes, encoding: str) -> tuple[bytes, str | None, int]:
    """Excel's optional first line ``sep=;`` names the delimiter: use it and read from the next line.

    Returns the bytes from the header on, the delimiter the line names (None without one) and the
    number of lines skipped. Only comma, semicolon and tab are taken, as everywhere else.
    """
    if encoding.lower().replace("-", "") not in ("utf8", "utf8sig", "cp1252", "latin1", "ascii"):
        return raw, None, 0
    head = raw[3:] if raw.startswith(b"\xef\xbb\xbf") else raw
    match = _SEP_LINE.match(head)
    if not match or match.group(1) not in (b",", b";", b"\t"):
        return raw, None, 0
    return head[match.end():], match.group(1).decode("ascii"), 1


def _row_lines(raw: bytes, encoding: str, delimiter: str, n_records: int) -> list[int]:
    """First physical line of each record. One line per record unless a quoted cell spans lines."""
    newlines = raw.count(b"\n")
    if newlines == n_records - (0 if raw.endswith(b"\n") else 1) and b"\r" not in raw.replace(b"\r\n", b""):
        return list(range(1, n_records + 1))
    starts, line = [], 1
    reader = csv.reader(io.StringIO(raw.decode(encoding, errors="replace"), newline=""), delimiter=delimiter,
                        skipinitialspace=True)
    for _ in reader:
        starts.append(line)
        line = reader.line_num + 1
    if len(starts) != n_records:  # a shape pandas and csv disagree on: record numbers are the best we have
        return list(range(1, n_records + 1))
    return starts


def _structure_problem(path, raw: bytes, encoding: str, delimiter: str, detail: str) -> str:
    """The line a CSV breaks on and why, found with the csv module (slower, exact)."""
    shown = {",": "comma", ";": "semicolon", "\t": "tab"}[delimiter]
    reader = csv.reader(io.StringIO(raw.decode(encoding, errors="replace"), newline=""), delimiter=delimiter,
                        skipinitialspace=True, strict=True)
    width, line = None, 1
    try:
        for record in reader:
            if width is None:
                width = len(record)
            elif len(record) > width:
                return (f"{path}: row {line} has {len(record)} cells but the header has {width}; a cell that holds "
                        f"the delimiter ({shown}) needs quotes around it, or the row has one cell too many.")
            line = reader.line_num + 1
    except csv.Error:
        return (f"{path}: row {line}: a quote (\") opens a cell that never closes, so the rest of the file would "
                "be read as one cell; close the quote or remove it.")
    return f"{path}: cannot be read as CSV ({' '.join(detail.split())})."


# ------------------------------------------------------------------ counts

def count_cells(cells: pd.Series, column: str) -> tuple[np.ndarray, np.ndarray, list[tuple[int, str, str]]]:
    """Whole non-negative counts from text cells -> (values, bad, problems).

    ``problems`` are ``(position, column, reason)``, one per bad cell: empty,
    NaN, not a number, infinite, negative, fractional, or above 2^53 (beyond
    which a float no longer holds every whole number, so it would be stored
    rounded).
    """
    raw = cells.astype(str).str.strip()
    values = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    empty = (raw == "").to_numpy()
    named_nan = raw.str.lower().isin(["nan", "-nan", "+nan"]).to_numpy()
    nonnum = np.isnan(values) & ~empty & ~named_nan
    infinite = np.isinf(values)
    finite = np.isfinite(values)
    negative = finite & (values < 0)
    fractional = finite & ~negative & (np.floor(values) != values)
    too_large = finite & ~negative & ~fractional & (values >= MAX_COUNT - 1)
    for i in np.flatnonzero(too_large):  # exact check on the text: a float cannot tell 2**53 from 2**53 + 1
        try:
            too_large[i] = int(float(raw.iat[i])) > MAX_COUNT or int(raw.iat[i]) > MAX_COUNT
        except ValueError:
            too_large[i] = float(raw.iat[i]) > MAX_COUNT
    problems: list[tuple[int, str, str]] = []
    for i in np.flatnonzero(empty):
        problems.append((i, column, "is empty; write 0 if there were none"))
    for i in np.flatnonzero(named_nan):
        problems.append((i, column, "is NaN; write the real count"))
    for i in np.flatnonzero(nonnum):
        problems.append((i, column, f"'{short(raw.iat[i])}' is not a number; {_count_hint(raw.iat[i])}"))
    for i in np.flatnonzero(infinite):
        problems.append((i, column, f"'{short(raw.iat[i])}' is infinite; write the real count"))
    for i in np.flatnonzero(negative):
        problems.append((i, column, f"{short(raw.iat[i])} is negative; counts cannot be below 0, so check the value and the column"))
    for i in np.flatnonzero(fractional):
        text = raw.iat[i]
        hint = (f"; if it means {text.replace('.', '')}, write it without the thousands separator"
                if re.fullmatch(r"[+]?\d{1,3}(\.\d{3})+", text) else "")
        problems.append((i, column, f"{short(text)} is fractional; counts must be whole numbers{hint}"))
    for i in np.flatnonzero(too_large):
        problems.append((i, column, f"{short(raw.iat[i])} is too large to be a count (the limit is 2^53)"))
    bad = empty | named_nan | nonnum | infinite | negative | fractional | too_large
    clean = np.where(bad, 0, np.nan_to_num(values, nan=0, posinf=0, neginf=0)).astype(np.int64)
    return clean, bad, problems


def _count_hint(text: str) -> str:
    """What to write instead of a count that is not a number."""
    if text.endswith("%"):
        return "give the count itself, not a percentage"
    if re.fullmatch(r"[+-]?\d{1,3}([,.' \u00a0\u202f]\d{3})+", text):
        return "write it without thousands separators (e.g. 1234)"
    return "write a whole number in digits (e.g. 1234)"


def long_cells(cells: pd.Series, column: str, limit: int, noun: str) -> list[tuple[int, str, str]]:
    """Problems for cells longer than ``limit`` characters."""
    lengths = cells.astype(str).str.len().to_numpy()
    return [(int(i), column, f"has {lengths[i]:,} characters; {noun} may have at most {limit}")
            for i in np.flatnonzero(lengths > limit)]


_CONTROL = CONTROL_CHARS  # and their bytes in a UTF-8 or cp1252 file:
_CONTROL_BYTES = re.compile(rb"[\x00-\x08\x0b\x0c\x0e-\x1f\x7f]|\xc2[\x80-\x9f]")
_CONTROL_NAMES = {0x00: "NUL", 0x07: "bell", 0x08: "backspace", 0x0B: "vertical tab", 0x0C: "form feed",
                  0x1B: "escape", 0x7F: "delete"}


def control_cells(cells: pd.Series, column: str) -> list[tuple[int, str, str]]:
    """Problems for cells holding a control character (not tab or line breaks), one per cell, as (position,
    column, reason): refused, never dropped silently, so what is stored is what the user sees."""
    text = cells.astype(object).where(cells.notna(), "").astype(str)
    hits = np.flatnonzero(text.str.contains(_CONTROL).to_numpy(dtype=bool))
    problems = []
    for i in hits:
        value = text.iat[i]
        at = _CONTROL.search(value).start()
        code = ord(value[at])
        name = _CONTROL_NAMES.get(code, "a control character")
        problems.append((int(i), column, f"holds U+{code:04X} ({name}) at character {at + 1}, an invisible control "
                                         "character; delete it (retype the text around it if you cannot see it)"))
    return problems


def may_hold_controls(frame: pd.DataFrame) -> bool:
    """False when :func:`read_cells` saw no control byte in the file (so its cells need no check)."""
    return bool(frame.attrs.get("controls", True))


# ------------------------------------------------------------------ drafts

def _name_key(name: object) -> str:
    """A header as compared: no case, spaces, '_', '-', '.', nor invisible format characters (a zero-width
    space or a stray byte-order mark pasted in with the name)."""
    text = "".join(ch for ch in str(name) if unicodedata.category(ch) != "Cf")
    return re.sub(r"[\s_\-.]+", "", text.casefold())


def known_names(columns: Sequence[str], known: Sequence[str]) -> dict[str, str]:
    """``{header: contentlab name}`` for headers that name a known column in another spelling.

    Case, spaces, ``-``, ``_`` and ``.`` do not matter: ``Event ID``, ``event-id`` and ``EventId`` are
    ``event_id``. Such a column used to be skipped without a word (and with it, say, every row's event id).
    """
    keys = {_name_key(k): k for k in known}
    return {c: keys[_name_key(c)] for c in columns if _name_key(c) in keys and c != keys[_name_key(c)]}


def unused_columns(frame: pd.DataFrame, known: Sequence[str]) -> list[str]:
    """Columns of ``frame`` contentlab does not read; a column without a header ('(unnamed column N)') only when
    it holds something (an export's trailing delimiter makes an empty one)."""
    out = []
    for j, c in enumerate(frame.columns):
        if c in known or c == "row":
            continue
        if str(c).startswith("(unnamed column") and not (frame.iloc[:, j].astype(str).str.strip() != "").any():
            continue
        out.append(str(c))
    return out


def _canonical_columns(frame: pd.DataFrame, path, known: Sequence[str], aliases: dict[str, Sequence[str]]) -> pd.DataFrame:
    """Known column names in any spelling (:func:`known_names`) and aliases; refuse two columns that mean the same."""
    names = list(known) + [a for group in aliases.values() for a in group]
    rename = known_names(frame.columns, names)
    for target in set(rename.values()):
        same = [c for c in frame.columns if c == target or rename.get(c) == target]
        if len(same) > 1:
            raise ContentlabError(
                f"{path}: row {header_row(frame)} (header), columns {', '.join(repr(c) for c in same)} are all read "
                f"as {target}; keep one."
            )
    frame = frame.rename(columns=rename)
    for target, names in aliases.items():
        present = [c for c in names if c in frame.columns]
        if len(present) > 1:
            raise ContentlabError(
                f"{path}: row {header_row(frame)} (header), columns {', '.join(repr(c) for c in present)} all give "
                f"{target}; keep one."
            )
        if present and present[0] != target:
            frame = frame.rename(columns={present[0]: target})
    return frame


def read_drafts(path: str | Path) -> pd.DataFrame:
    """A drafts CSV as text cells: ``headline``; optional ``channel``, ``publish_at``, ``group``, ``arm``.

    ``published_at``, ``at`` and ``time`` are read as ``publish_at`` (one of
    them at most). Adds ``row``, each draft's line in the file.
    """
    frame = _canonical_columns(read_cells(path, "drafts file"), path, DRAFT_COLUMNS, {"publish_at": PUBLISH_ALIASES})
    if "headline" not in frame.columns:
        raise ContentlabError(
            f"{path}: row {header_row(frame)} (header) has no 'headline' column; it has: {', '.join(frame.columns) or 'nothing'}. "
            "A drafts file needs headline and may have channel, publish_at (or time), group and arm."
        )
    if frame.empty:
        raise ContentlabError(f"{path}: has a header but no drafts; write one headline a row below the header.")
    frame["row"] = frame.index.to_numpy()
    frame = frame.reset_index(drop=True)
    frame.attrs["source"] = str(path)
    return frame


def _draft_where(frame: pd.DataFrame, source: str | None, i: int, column: str) -> str:
    return _drafts_where(frame, source, [i], column)


def _drafts_where(frame: pd.DataFrame, source: str | None, positions: Sequence[int], column: str) -> str:
    """Where drafts are: ``drafts.csv: rows 3, 5, column 'publish_at'``, or ``drafts 1, 3, publish_at`` without a file."""
    if source:
        rows = [int(frame["row"].iat[i]) for i in positions] if "row" in frame.columns else [i + 2 for i in positions]
        return f"{source}: {rows_text(rows)}, column '{column}'"
    numbers = rows_text([i + 1 for i in positions]).replace("row", "draft", 1)
    return f"{numbers}, {column}"


def prepare_drafts(
    frame: pd.DataFrame,
    timezone: str = "UTC",
    *,
    channel: str | None = None,
    at: str | None = None,
    known_channels: Sequence[str] | None = None,
    source: str | None = None,
) -> pd.DataFrame:
    """Check drafts and add ``local_hour``, ``local_weekday`` and ``local_date`` from their publish time.

    The publish time is ``publish_at`` (or ``published_at``, ``at``, ``time``),
    else ``at``; it is read by :func:`contentlab.timeparse.parse_datetimes` in
    ``timezone``. ``channel`` fills drafts that name none. Raises
    :class:`ContentlabError` naming the row and column for an empty or
    over-long headline, a time that is not ISO 8601, an over-long channel, or a
    channel not in ``known_channels`` (when given). Input columns are kept;
    ``attrs['time_notes']`` says how local times at a clock change were read.
    """
    if not isinstance(frame, pd.DataFrame):
        raise ContentlabError("drafts must be a DataFrame with a 'headline' column, or a list of headlines")
    if "headline" not in frame:
        raise ContentlabError("drafts need a 'headline' column")
    from .features import clean_headline

    source = source if source not in (None, "arguments") else frame.attrs.get("source")
    out = frame.copy()
    if len(out) == 0:
        raise ContentlabError("no drafts to score: give at least one headline")
    for i, text in enumerate(clean_headline(h) for h in out["headline"].tolist()):
        if not text:
            raise ContentlabError(f"{_draft_where(out, source, i, 'headline')}: the draft is empty; write a headline")
        if len(text) > MAX_DRAFT_CHARS:
            raise ContentlabError(
                f"{_draft_where(out, source, i, 'headline')}: the draft has {len(text)} characters; a headline "
                f"may have at most {MAX_DRAFT_CHARS}. Is this body text? Score the headline alone."
            )
    controls = [p for column in ("headline", "channel", "group") if column in out
                for p in control_cells(out[column], column)]
    if controls:
        i, column, reason = min(controls)
        raise ContentlabError(f"{_draft_where(out, source, i, column)}: {reason}")
    if channel is not None:
        if _CONTROL.search(channel):
            raise ContentlabError(f"--channel: {control_cells(pd.Series([channel]), 'channel')[0][2]}")
        if len(channel.strip()) > MAX_NAME_CHARS:
            raise ContentlabError(f"--channel: has {len(channel.strip())} characters; a channel may have at most {MAX_NAME_CHARS}")
        if "channel" not in out:
            out["channel"] = channel
        else:
            blank = out["channel"].isna() | (out["channel"].astype(str).str.strip() == "")
            out.loc[blank, "channel"] = channel
    if "channel" in out:
        channels = [None if _blank(c) else str(c).strip() for c in out["channel"].tolist()]
        out["channel"] = pd.Series(channels, index=out.index, dtype=object)
        known = set(known_channels) if known_channels is not None else None
        for i, c in enumerate(channels):
            if c is not None and len(c) > MAX_NAME_CHARS:
                raise ContentlabError(f"{_draft_where(out, source, i, 'channel')}: has {len(c):,} characters; "
                                      f"a channel may have at most {MAX_NAME_CHARS}")
            if known is not None and c is not None and c not in known:
                raise ContentlabError(
                    f"{_draft_where(out, source, i, 'channel')}: '{short(c)}' is not a channel in your history; "
                    f"use one of: {', '.join(sorted(known))}"
                )
    column, own = _publish_times(out, timezone)
    notes: list[str] = []
    stored, has_time = own.stored.copy(), own.has_time.copy()
    if at is not None:  # a bad --at is refused even when every draft has its own time
        given = parse_datetimes([_time_text(at)], timezone)
        if given.errors[0] is not None:
            raise ContentlabError(f"--at: {given.errors[0]}.")
        notes += given.clock_notes(lambda positions: "--at")
        stored[own.empty], has_time[own.empty] = given.stored[0], given.has_time[0]
    bad = np.flatnonzero(own.failed)
    if len(bad):
        raise ContentlabError(f"{_draft_where(out, source, int(bad[0]), column)}: {own.errors[bad[0]]}.")
    notes += own.clock_notes(lambda positions: _drafts_where(out, source, positions, column))
    out["local_hour"], out["local_weekday"], out["local_date"] = _local_parts(stored, has_time, timezone)
    out.attrs["time_notes"] = notes  # how local times at a clock change were read (timeparse.ParsedTimes.clock_notes)
    return out


def publish_time_notes(drafts, timezone: str, *, source: str | None = None, group: str | None = None) -> list[str]:
    """How the drafts' local publish times at a clock change are read, for a command that keeps them as given
    (``experiment new``); ``group`` limits the notes to the drafts of that group."""
    if not isinstance(drafts, pd.DataFrame):
        return []
    frame = drafts.reset_index(drop=True)
    if group is not None and "group" in frame:
        frame = frame[frame["group"].astype(str).str.strip() == group].reset_index(drop=True)
    column, parsed = _publish_times(frame, timezone)
    source = source if source is not None else frame.attrs.get("source")
    return parsed.clock_notes(lambda positions: _drafts_where(frame, source, positions, column))


def _publish_times(frame: pd.DataFrame, timezone: str):
    """(the drafts' publish-time column or None, its values read by :func:`contentlab.timeparse.parse_datetimes`)."""
    column = next((c for c in PUBLISH_ALIASES if c in frame), None)
    values = frame[column].tolist() if column else [None] * len(frame)
    return column, parse_datetimes([None if _blank(v) else _time_text(v) for v in values], timezone)


def _time_text(value) -> str:
    """A publish time as text for :func:`contentlab.timeparse.parse_datetimes` (a pandas Timestamp in ISO form)."""
    return value.isoformat() if isinstance(value, pd.Timestamp) else str(value)


def _local_parts(stored: np.ndarray, has_time: np.ndarray, timezone: str) -> tuple[np.ndarray, np.ndarray, list]:
    """Stored times (UTC date-times, dates alone, "" for none) -> local hour (NaN for a date alone), weekday, date."""
    n = len(stored)
    hours, weekdays = np.full(n, np.nan), np.full(n, np.nan)
    dates: list[str | None] = [None] * n
    timed = np.flatnonzero(has_time & (stored != ""))
    if len(timed):
        local = pd.to_datetime(pd.Series(stored[timed], dtype=object), utc=True, format="ISO8601").dt.tz_convert(timezone)
        hours[timed] = (local.dt.hour + local.dt.minute / 60.0).to_numpy()
        weekdays[timed] = local.dt.weekday.to_numpy()
        for i, day in zip(timed, local.dt.strftime("%Y-%m-%d")):
            dates[i] = day
    dated = np.flatnonzero(~has_time & (stored != ""))
    if len(dated):
        days = pd.to_datetime(pd.Series(stored[dated], dtype=object), format="%Y-%m-%d")
        weekdays[dated] = days.dt.weekday.to_numpy()
        for i in dated:
            dates[i] = stored[i]
    return hours, weekdays, dates


def _blank(v) -> bool:
    return v is None or (isinstance(v, float) and math.isnan(v)) or v is pd.NA or (isinstance(v, str) and not v.strip())


# ------------------------------------------------------------------ results

def read_results(path: str | Path) -> pd.DataFrame:
    """A results CSV as text cells: ``arm, impressions, clicks``; optional ``at``, ``event_id``.

    Adds ``row`` (each result's line); ``attrs['digest']`` identifies the
    whole content: it marks the rows as a file's (record identifies them by
    the file's rows, see ``experiments._file_row_ids``) and still matches rows
    recorded before that rule.
    """
    frame = _canonical_columns(read_cells(path, "results file"), path, RESULT_COLUMNS, {})
    missing = [c for c in ("arm", "impressions", "clicks") if c not in frame.columns]
    if missing:
        raise ContentlabError(
            f"{path}: row {header_row(frame)} (header), missing column(s): {', '.join(missing)}. A results file has arm, impressions, "
            f"clicks and optionally at and event_id; it has: {', '.join(frame.columns)}."
        )
    if frame.empty:
        raise ContentlabError(f"{path}: has a header but no results; nothing was recorded. Write one result a row "
                              "below the header (arm, impressions, clicks).")
    frame["row"] = frame.index.to_numpy()
    frame = frame.reset_index(drop=True)
    return frame


def check_results(
    frame: pd.DataFrame,
    arms: Sequence[str],
    timezone: str,
    *,
    source: str | None = None,
    options: bool = False,
    experiment: str = "the experiment",
) -> pd.DataFrame:
    """Every result row checked once -> ``arm, impressions, clicks, at, event_id, row`` (``at`` stored UTC or '').

    Each real problem is reported once, naming only columns the input has (or
    the option, ``--clicks``, when ``options``): a count that is not a whole
    number is not also compared with impressions. Raises
    :class:`ContentlabError` with the first problems when any row is bad.
    """
    for column in ("arm", "impressions", "clicks"):
        if column not in frame.columns:
            raise ContentlabError(f"{source or 'results'}: needs a column '{column}'; nothing was recorded.")
    frame = frame.reset_index(drop=True)
    n = len(frame)
    if n == 0:
        raise ContentlabError(f"{source or 'results'}: has no rows; nothing was recorded.")
    rows = frame["row"].to_numpy(dtype=np.int64) if "row" in frame.columns else np.arange(n) + (2 if source else 1)

    def here(i: int, column: str) -> str:
        if options:
            return f"--{column.replace('_', '-')}"
        prefix = f"{source}: " if source else ""
        return f"{prefix}row {int(rows[i])}, column '{column}'"

    def text(column: str) -> pd.Series:
        if column not in frame.columns:
            return pd.Series([""] * n, dtype=object)
        col = frame[column]
        return col.astype(object).where(col.notna(), "").astype(str).str.strip()

    found: list[tuple[int, str, str]] = []
    arm = text("arm")
    known = list(arms)
    for i in np.flatnonzero(~arm.isin(set(known)).to_numpy()):
        shown = f"'{short(arm.iat[i])}'" if arm.iat[i] else "(empty)"
        found.append((i, "arm", f"{shown} is not an arm of {experiment}; its arms are {', '.join(known)}"))
    impressions, bad_n, p1 = count_cells(text("impressions"), "impressions")
    clicks, bad_k, p2 = count_cells(text("clicks"), "clicks")
    found += p1 + p2
    for i in np.flatnonzero((clicks > impressions) & ~bad_n & ~bad_k):
        found.append((i, "clicks", f"{clicks[i]:,} clicks is more than its {impressions[i]:,} impressions; check the "
                                      "two columns are not swapped"))
    at = np.full(n, "", dtype=object)
    notes: list[str] = []
    if "at" in frame.columns:
        parsed = parse_datetimes(text("at"), timezone)
        for i in np.flatnonzero(parsed.failed):
            found.append((int(i), "at", parsed.errors[i]))
        at = parsed.stored
        prefix = f"{source}: " if source else ""
        notes = parsed.clock_notes(lambda positions: "--at" if options else
                                   f"{prefix}{rows_text(rows[positions])}, column 'at'")
    event_id = text("event_id")
    found += long_cells(event_id, "event_id", MAX_ID_CHARS, "an event id")
    found += control_cells(event_id, "event_id")
    if found:
        found.sort(key=lambda p: (rows[p[0]], p[1]))
        raise ContentlabError(_one_line([f"{here(i, c)}: {r}" for i, c, r in found], "nothing was recorded"))
    clean = pd.DataFrame({
        "arm": arm.to_numpy(dtype=object), "impressions": impressions, "clicks": clicks, "at": at,
        "event_id": event_id.to_numpy(dtype=object), "row": rows,
    })
    clean.attrs["time_notes"] = tuple(notes)  # local times at a clock change: how they were read
    return clean


def _one_line(problems: list[str], outcome: str, limit: int = 3) -> str:
    """Problems on one line: the first few, then how many more."""
    shown = "; ".join(problems[:limit])
    more = f" (and {len(problems) - limit} more)" if len(problems) > limit else ""
    return f"{shown}{more}; {outcome}."
