"""Publishing files (pipeline/files.py): the target is replaced whole or not at all, and no
temporary file is left behind."""
import json
import os

import pandas as pd
import pytest

from pipeline.files import write_json_atomic, write_parquet_atomic, write_text_atomic


def test_atomic_write_replaces_the_file(tmp_path):
    path = tmp_path / "worklist.parquet"
    write_parquet_atomic(pd.DataFrame({"a": [1]}), path)
    write_parquet_atomic(pd.DataFrame({"a": [2, 3]}), path)
    assert pd.read_parquet(path)["a"].tolist() == [2, 3]
    assert os.listdir(tmp_path) == ["worklist.parquet"]


def test_crash_mid_write_leaves_previous_file_intact(tmp_path, monkeypatch):
    path = tmp_path / "worklist.parquet"
    write_parquet_atomic(pd.DataFrame({"a": [1]}), path)

    def half_write(self, target, **kw):      # the writer dies after writing part of the file
        with open(target, "wb") as fh:
            fh.write(b"PAR1 half a file")
        raise OSError("disk full")

    monkeypatch.setattr(pd.DataFrame, "to_parquet", half_write)
    with pytest.raises(OSError):
        write_parquet_atomic(pd.DataFrame({"a": [9, 9]}), path)
    monkeypatch.undo()
    assert pd.read_parquet(path)["a"].tolist() == [1]
    assert os.listdir(tmp_path) == ["worklist.parquet"]   # no temporary file left behind


def test_text_is_written_exactly_as_given(tmp_path):
    path = tmp_path / "quality.html"
    write_text_atomic("old\n", path)
    write_text_atomic("<p>K 6.1 mmol/L, µ</p>\r\nend\n", path)
    assert path.read_bytes() == "<p>K 6.1 mmol/L, µ</p>\r\nend\n".encode("utf-8")
    assert os.listdir(tmp_path) == ["quality.html"]


def test_json_summary_has_sorted_keys_and_text_for_other_values(tmp_path):
    path = write_json_atomic({"b": 1, "a": pd.Timestamp("2026-11-29", tz="UTC")}, tmp_path / "run_summary.json")
    text = path.read_text(encoding="utf-8")
    assert text.index('"a"') < text.index('"b"')
    assert json.loads(text) == {"a": "2026-11-29 00:00:00+00:00", "b": 1}


def test_published_file_gets_the_umask_mode_like_an_ordinary_open(tmp_path):
    # mkstemp would give 0600; a published file is read by other tools, as open() would allow.
    plain = tmp_path / "plain.txt"
    plain.write_text("x", encoding="utf-8")
    published = write_text_atomic("x", tmp_path / "published.txt")
    assert published.stat().st_mode & 0o777 == plain.stat().st_mode & 0o777
