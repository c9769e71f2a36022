"""The saved-model file (issue 9, item 8): plain arrays and JSON, a format version, no pickle."""

from __future__ import annotations

import io
import json
import pickle
import shutil
import sqlite3
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from contentlab import modelfile
from contentlab.cli import main
from contentlab.errors import ContentlabError
from contentlab.ingest import read_history
from contentlab.model import EngagementModel
from contentlab.workspace import add_local_time

ROOT = Path(__file__).resolve().parent.parent
CORPUS = ROOT / "corpus"


@pytest.fixture(scope="module")
def model() -> EngagementModel:
    posts = add_local_time(read_history(CORPUS / "posts.csv").posts.drop(columns="row"), "UTC")
    return EngagementModel(n_bootstrap=5).fit(posts, outcome="clicks")


def test_round_trip_predicts_the_same(model):
    blob = modelfile.dumps(model)
    again = modelfile.loads(blob)
    drafts = pd.read_csv(CORPUS / "drafts.csv")
    pd.testing.assert_frame_equal(model.predict_frame(drafts), again.predict_frame(drafts))
    pd.testing.assert_frame_equal(model.contributions(drafts), again.contributions(drafts))
    pd.testing.assert_frame_equal(model.drivers(), again.drivers())
    pd.testing.assert_frame_equal(model.oof_, again.oof_)
    assert json.dumps(model.summary(), default=float) == json.dumps(again.summary(), default=float)


def test_file_is_plain_npz_readable_without_pickle(model):
    blob = modelfile.dumps(model)
    # numpy refuses object arrays when allow_pickle=False: every entry must load this way.
    with np.load(io.BytesIO(blob), allow_pickle=False) as npz:
        meta = json.loads(npz[modelfile._META].tobytes())
        for key in npz.files:
            assert npz[key].dtype != object
    assert meta["format"] == "contentlab-model" and meta["version"] == modelfile.FORMAT_VERSION
    assert b"\x80\x04" not in blob[:2]


def _with_meta(blob: bytes, change) -> bytes:
    with np.load(io.BytesIO(blob), allow_pickle=False) as npz:
        arrays = {k: npz[k] for k in npz.files}
    meta = json.loads(arrays[modelfile._META].tobytes())
    change(meta)
    arrays[modelfile._META] = np.frombuffer(json.dumps(meta).encode(), dtype=np.uint8)
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    return buf.getvalue()


def test_unknown_version_says_learn_again(model):
    blob = _with_meta(modelfile.dumps(model), lambda m: m.update(version=99))
    with pytest.raises(ContentlabError, match=r"format version 99.*contentlab learn"):
        modelfile.loads(blob)


def test_unknown_class_is_refused(model):
    def change(meta):
        meta["model"]["class"] = "Popen"

    with pytest.raises(ContentlabError, match="damaged.*contentlab learn"):
        modelfile.loads(_with_meta(modelfile.dumps(model), change))


@pytest.mark.parametrize("blob", [b"", b"not a model", b"PK\x03\x04broken"])
def test_damaged_blob_says_learn_again(blob):
    with pytest.raises(ContentlabError, match="contentlab learn"):
        modelfile.loads(blob)


def test_old_pickled_model_is_never_unpickled():
    # A pickle whose loading would run code: the message must come before any unpickling.
    class Boom:
        def __reduce__(self):
            return (exec, ("raise SystemExit('unpickled!')",))

    with pytest.raises(ContentlabError, match=r"older contentlab.*pickle.*contentlab learn"):
        modelfile.loads(pickle.dumps(Boom(), protocol=4))


def test_cli_on_a_workspace_with_an_old_pickled_model(tmp_path, capsys):
    ws = tmp_path / "ws"
    assert main(["import", str(CORPUS / "posts.csv"), "--workspace", str(ws), "--quiet"]) == 0
    assert main(["learn", "--workspace", str(ws), "--bootstrap", "0", "--quiet"]) == 0
    capsys.readouterr()
    conn = sqlite3.connect(ws / "workspace.sqlite")
    with conn:
        conn.execute("UPDATE models SET blob=?", (pickle.dumps({"an": "old model"}, protocol=4),))
    conn.close()
    code = main(["score", "Five quiet changes to the reading room", "--channel", "blog", "--workspace", str(ws)])
    out, err = capsys.readouterr()
    assert code == 2
    assert "Traceback" not in err and "pickle" in err and "contentlab learn" in err
