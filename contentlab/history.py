"""Import a post-history export into a workspace as one transaction."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from .errors import ContentlabError
from .ingest import READ_STEPS, History, format_problems, read_history
from .readers import short
from .workspace import Workspace


@dataclass(frozen=True)
class ImportSummary:
    file: str
    rows_read: int
    added: int
    updated: int
    unchanged: int
    rejected: int
    rejected_file: str | None = None
    repeated: int = 0  # rows identical to an earlier row of the same file (same post_id and values)
    unused: tuple[str, ...] = ()  # columns of the file that contentlab does not read
    notes: tuple[str, ...] = ()  # local times at a clock change: how they were read (shown below the line)

    def line(self) -> str:
        text = (
            f"{self.file}: {self.rows_read} rows read, {self.added} added, {self.updated} updated, "
            f"{self.unchanged} unchanged, {self.rejected} rejected"
        )
        if self.repeated:
            text += f", {self.repeated} repeated (identical to an earlier row of the file, counted once)"
        if self.rejected_file:
            text += f" (see {self.rejected_file})"
        if self.unused:
            shown = ", ".join(f"'{short(c)}'" for c in self.unused[:8]) + (" ..." if len(self.unused) > 8 else "")
            text += f"; not read: column(s) {shown} (the README lists the columns contentlab reads)"
        return text


def rejected_path(path: Path) -> Path:
    """Where --skip-bad writes the rejected rows: beside the input."""
    name = path.name
    for suffix in (".csv.gz", ".gz", ".csv", ".tsv", ".txt"):
        if name.lower().endswith(suffix):
            name = name[: -len(suffix)]
            break
    return path.with_name(f"{name}.rejected.csv")


def import_history(
    ws: Workspace,
    path: str | Path,
    mapping: str | Path | None = None,
    *,
    skip_bad: bool = False,
    progress: bool = False,
) -> ImportSummary:
    """Validate ``path`` and store its posts; all or nothing unless ``skip_bad``.

    Raises :class:`ContentlabError` listing up to 20 problems when any row is
    bad and ``skip_bad`` is off; the workspace is then left as it was.
    """
    path = Path(path)
    show = progress and _is_large(path)
    reading = _bar(show, desc=f"checking {path.name}", total=READ_STEPS, unit="step")
    try:
        history: History = read_history(path, mapping, timezone=ws.timezone, progress=reading)
    finally:
        if reading is not None:
            reading.close()
    if history.problems and not skip_bad:
        raise ContentlabError(
            f"{path}: {history.rejected.shape[0]} of {history.rows_read} rows have problems; nothing was imported.\n"
            + format_problems(history.problems)
            + "\nFix these rows, or pass --skip-bad to import the good rows and write the rest to a file."
        )
    if history.rows_read == 0:
        raise ContentlabError(f"{path}: has a header but no rows; nothing was imported. Export the posts again "
                              "(check the date range of the export), then import that file.")
    out_file = None
    if skip_bad and len(history.rejected):
        # Written before the transaction, so a file we cannot write leaves the workspace as it was.
        from .safety import write_csv

        out = rejected_path(path)
        try:
            out = _unclobbered(out, history.rejected)
            write_csv(history.rejected, out)
        except OSError as exc:
            raise ContentlabError(f"{out}: cannot write the rejected rows ({exc.strerror}); nothing was imported.") from None
        out_file = str(out)
    storing = _bar(show, desc="storing", total=len(history.posts), unit="post")
    try:
        with ws.conn:
            added, updated, unchanged = ws.upsert_posts(history.posts, source="import", progress=storing)
            ws.record_import(str(path), history.rows_read, added, updated, unchanged, len(history.rejected))
    finally:
        if storing is not None:
            storing.close()
    repeated = history.rows_read - len(history.posts) - len(history.rejected)
    return ImportSummary(
        str(path), history.rows_read, added, updated, unchanged, len(history.rejected), out_file, repeated,
        tuple(history.ignored_columns), tuple(history.notes),
    )


def _unclobbered(out: Path, rejected) -> Path:
    """``out``, unless a different file holds that name (rows the user is fixing, say): then the first free
    ``NAME-2.csv``, ``NAME-3.csv``, ... An identical earlier file (the same import again) is simply rewritten."""
    import io

    from .safety import write_csv

    if not out.exists():
        return out
    text = io.StringIO()
    write_csv(rejected, text)
    if out.is_file() and out.read_bytes() == text.getvalue().encode("utf-8"):
        return out
    stem = out.name[: -len(".csv")]
    n = 2
    while out.with_name(f"{stem}-{n}.csv").exists():
        n += 1
    return out.with_name(f"{stem}-{n}.csv")


# Files above this size show progress bars (about 30,000 posts).
LARGE_FILE_BYTES = 4_000_000


def _is_large(path: Path) -> bool:
    try:
        return path.stat().st_size >= LARGE_FILE_BYTES
    except OSError:
        return False


def _bar(show: bool, **kwargs):
    """A tqdm bar on stderr that disappears when done, or None."""
    if not show:
        return None
    import sys

    from tqdm import tqdm

    return tqdm(file=sys.stderr, leave=False, dynamic_ncols=True, **kwargs)
