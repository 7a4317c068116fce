"""Publishing files (pipeline/files.py): the target is replaced whole or not at all, no
temporary file is left behind, and files and the folders made for them are owner-only."""
import json
import os

import pandas as pd
import pytest

from cardiosieve.pipeline.files import private_dir, write_atomic, write_json_atomic, write_parquet_atomic, write_text_atomic
from tests.modes import any_umask, mode  # noqa: F401 (any_umask is a fixture)


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


def test_published_file_is_owner_only_whatever_the_umask(tmp_path, any_umask):
    # Published files name patients: 0600 even where the umask would give 0666 or 0644.
    text = write_text_atomic("x", tmp_path / "published.txt")
    table = write_parquet_atomic(pd.DataFrame({"a": [1]}), tmp_path / "worklist.parquet")
    assert mode(text) == mode(table) == 0o600


def test_a_writer_that_replaces_the_temporary_file_still_publishes_owner_only(tmp_path, any_umask):
    def recreate(tmp):                       # some writers unlink and create their file anew
        tmp.unlink()
        tmp.write_text("x", encoding="utf-8")
    assert mode(write_atomic(tmp_path / "out.txt", recreate)) == 0o600


def test_private_dir_makes_each_new_folder_owner_only_and_leaves_the_folders_above(tmp_path, any_umask):
    shared = tmp_path / "shared"
    shared.mkdir()
    os.chmod(shared, 0o755)                  # like /tmp or a shared mount: not ours to change
    leaf = shared / "out" / "_stage" / "20261129T000000Z_20261130T000000Z"
    assert private_dir(leaf) == leaf and leaf.is_dir()
    assert [mode(p) for p in (shared / "out", shared / "out" / "_stage", leaf)] == [0o700] * 3
    assert mode(shared) == 0o755


def test_private_dir_tightens_an_existing_folder_of_ours(tmp_path, any_umask):
    out = tmp_path / "out"
    out.mkdir()
    os.chmod(out, 0o755)
    (out / "kept.txt").write_text("x", encoding="utf-8")
    assert private_dir(out) == out and mode(out) == 0o700
    assert private_dir(out) == out and (out / "kept.txt").exists()   # again: nothing else changes


def test_private_dir_refuses_a_file_in_its_place(tmp_path):
    (tmp_path / "out").write_text("x", encoding="utf-8")
    with pytest.raises(FileExistsError):
        private_dir(tmp_path / "out")
