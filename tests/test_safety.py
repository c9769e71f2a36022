"""CSV written by contentlab: formula prefixes neutralised, line breaks inside cells quoted.

Reference: OWASP, "CSV Injection" (https://owasp.org/www-community/attacks/CSV_Injection): cells
starting with =, +, -, @, tab (0x09) or carriage return (0x0D) are prefixed with a single quote,
and cells are quoted. RFC 4180 section 2: fields containing line breaks (CRLF), double quotes or
commas are enclosed in double quotes.
"""

from __future__ import annotations

import csv
import io
import re
from pathlib import Path

import pandas as pd
import pytest

from contentlab.safety import neutralise_cell, neutralise_frame, write_csv

PACKAGE = Path(__file__).resolve().parent.parent / "contentlab"


@pytest.mark.parametrize("cell, expected", [
    ("=HYPERLINK(\"http://x\")", "'=HYPERLINK(\"http://x\")"),
    ("+1", "'+1"), ("-2 fewer fines", "'-2 fewer fines"), ("@SUM(A1)", "'@SUM(A1)"),
    ("\tx", "'\tx"), ("\rx", "'\rx"),
    ("\r=1+2", "'\r'=1+2"),                   # formula after a leading carriage return
    ("\t\r@x", "'\t\r'@x"),
    ("Library news\r=cmd|' /C calc'!A0", "Library news\r'=cmd|' /C calc'!A0"),   # after a CR inside
    ("line one\n+line two", "line one\n'+line two"),
    ("a\r\n-b", "a\r\n'-b"),
    ("Opening hours = 9-5", "Opening hours = 9-5"),        # a formula character inside a line is text
    ("", ""), ("plain", "plain"),
])
def test_formula_starts_are_neutralised_at_every_line_start(cell, expected):
    assert neutralise_cell(cell) == expected


def test_numbers_stay_numbers():
    assert neutralise_cell(-5) == -5 and neutralise_cell(-0.25) == -0.25 and neutralise_cell(None) is None
    frame = neutralise_frame(pd.DataFrame({"n": [-1, 2], "t": ["-1", "x"], "=h": ["a", "b"]}))
    assert list(frame["n"]) == [-1, 2] and list(frame["t"]) == ["'-1", "x"] and list(frame.columns)[2] == "'=h"


def test_a_bare_carriage_return_is_always_quoted(tmp_path):
    """pandas' default writer leaves a cell with a lone CR unquoted; a spreadsheet then starts a new row there."""
    frame = pd.DataFrame({"headline": ["first\rsecond", "one\ntwo", "plain"], "clicks": [1, 2, 3]})
    target = tmp_path / "out.csv"
    write_csv(frame, target)
    raw = target.read_bytes()
    assert b'"first\rsecond"' in raw and b'"one\ntwo"' in raw
    # Outside quoted cells, every CR is part of a CRLF record end (RFC 4180): no bare CR can split a row.
    outside = re.sub(rb'"(?:[^"]|"")*"', b"", raw)
    assert outside.count(b"\r") == outside.count(b"\r\n") == 4
    with target.open(newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    assert rows == [["headline", "clicks"], ["first\rsecond", "1"], ["one\ntwo", "2"], ["plain", "3"]]


def test_write_csv_to_a_stream_round_trips_through_pandas():
    frame = pd.DataFrame({"headline": ["=1+1", "x\r@y"], "rate": [0.5, -0.25]})
    buf = io.StringIO()
    write_csv(frame, buf)
    back = pd.read_csv(io.StringIO(buf.getvalue()), keep_default_na=False)
    assert list(back["headline"]) == ["'=1+1", "x\r'@y"] and list(back["rate"]) == [0.5, -0.25]


def test_every_csv_writer_goes_through_write_csv():
    """One neutralising function for every CSV the tool writes: no other to_csv or csv.writer in the package.

    The demo corpus generator is the one exception: it writes invented data, not user text.
    """
    offenders = []
    for path in PACKAGE.rglob("*.py"):
        if path.name in ("safety.py", "demo_corpus.py"):
            continue
        text = path.read_text(encoding="utf-8")
        for pattern in (r"\.to_csv\(", r"csv\.writer\(", r"csv\.DictWriter\("):
            if re.search(pattern, text):
                offenders.append(f"{path.relative_to(PACKAGE)}: {pattern}")
    assert not offenders, offenders


@pytest.mark.parametrize("fault", [KeyboardInterrupt, OSError])
def test_interrupted_write_leaves_the_earlier_file_whole(tmp_path, monkeypatch, fault):
    """Ctrl-C or a failing disk half-way through a CSV (report tables, --skip-bad rejects): the file of that
    name keeps its earlier content and no half-written temporary file stays behind."""
    target = tmp_path / "table.csv"
    target.write_bytes(b"earlier,content\r\n1,2\r\n")
    real = pd.DataFrame.to_csv

    def cut_short(self, path, *args, **kwargs):
        Path(path).write_text("half a ta", encoding="utf-8")
        raise fault("interrupted")

    monkeypatch.setattr(pd.DataFrame, "to_csv", cut_short)
    with pytest.raises(fault):
        write_csv(pd.DataFrame({"a": ["x"] * 1000}), target)
    monkeypatch.setattr(pd.DataFrame, "to_csv", real)
    assert target.read_bytes() == b"earlier,content\r\n1,2\r\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["table.csv"]
    write_csv(pd.DataFrame({"a": ["y"]}), target)  # and a whole write replaces it
    assert target.read_bytes() == b"a\r\ny\r\n"


@pytest.mark.parametrize("fault", [KeyboardInterrupt, OSError])
def test_failed_replace_leaves_no_temporary_file(tmp_path, monkeypatch, fault):
    """The last step can fail too (a stop signal arriving just before it, a disk that refuses the rename):
    the earlier file stays and the temporary file is removed."""
    import contentlab.safety as safety

    target = tmp_path / "page.html"
    target.write_text("earlier", encoding="utf-8")

    def refuse(src, dst):
        raise fault("stopped at the rename")

    monkeypatch.setattr(safety.os, "replace", refuse)
    with pytest.raises(fault):
        safety.write_text(target, "new page")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["page.html"]
    assert target.read_text(encoding="utf-8") == "earlier"
