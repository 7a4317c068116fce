"""`cardiosieve db upgrade` and `cardiosieve db current`, through the CLI's main (exit codes and
the one-line messages as a user sees them), and the read-only commands on a store behind."""
import subprocess
import sys

import pytest

from cardiosieve.pipeline.cli import EXIT_BAD_INPUT, EXIT_OK, main
from cardiosieve.pipeline.store import HEAD_REVISION, SCHEMA_VERSION, VERSION_TABLE, open_store, read_items
from tests.test_migrations import build_v1_store, build_v2_store, look


def cli(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture
def v1_out(tmp_path):
    """An OUT folder whose worklist.sqlite is a version-1 store (the first release's)."""
    build_v1_store(f"sqlite:///{tmp_path / 'worklist.sqlite'}").dispose()
    return tmp_path


def test_db_upgrade_brings_a_version_1_store_to_head_then_leaves_it_alone(capsys, v1_out):
    assert cli(capsys, "db", "current", "--out", v1_out)[:2] == (
        EXIT_OK, f"0001 (this cardiosieve needs {HEAD_REVISION}: back the store up, then run "
                 f"`cardiosieve db upgrade --out {v1_out}`)\n")
    assert cli(capsys, "db", "upgrade", "--out", v1_out)[:2] == (
        EXIT_OK, f"worklist store upgraded from schema revision 0001 to {HEAD_REVISION}\n")
    assert cli(capsys, "db", "current", "--out", v1_out)[:2] == (EXIT_OK, f"{HEAD_REVISION} (current)\n")
    assert cli(capsys, "db", "upgrade", "--db", f"sqlite:///{v1_out / 'worklist.sqlite'}")[:2] == (
        EXIT_OK, f"worklist store already at schema revision {HEAD_REVISION}\n")
    code, out, _ = cli(capsys, "show", "--out", v1_out)
    assert code == EXIT_OK and "(4 stored" in out


def test_read_only_commands_on_a_store_behind_exit_2_naming_db_upgrade(capsys, v1_out):
    before = look(f"sqlite:///{v1_out / 'worklist.sqlite'}")
    for command in (["show"], ["yield"], ["export"], ["review", "x", "--outcome", "finding_real", "--role", "r"]):
        code, out, err = cli(capsys, *command, "--out", v1_out)
        assert code == EXIT_BAD_INPUT, command
        assert err.count("\n") == 1 and f"`cardiosieve db upgrade --out {v1_out}`" in err, command
        assert "back it up" in err and out == ""
    after = look(f"sqlite:///{v1_out / 'worklist.sqlite'}")
    assert after["revision"] is None and after["version"] is None and after["ddl"] == before["ddl"]


def test_a_store_of_the_release_before_is_refused_by_read_only_commands_until_upgraded(capsys, tmp_path):
    # The release before the migrations made schema version 2; this code needs HEAD_REVISION.
    url = f"sqlite:///{tmp_path / 'worklist.sqlite'}"
    build_v2_store(url).dispose()
    code, out, err = cli(capsys, "show", "--out", tmp_path)
    assert code == EXIT_BAD_INPUT and out == "" and "schema revision 0002" in err and "db upgrade" in err
    code, out, _ = cli(capsys, "db", "current", "--out", tmp_path)
    assert code == EXIT_OK and out.startswith(f"0002 (this cardiosieve needs {HEAD_REVISION}")
    assert look(url)["revision"] is None                                  # still unstamped, unchanged
    assert cli(capsys, "db", "upgrade", "--out", tmp_path)[:2] == (
        EXIT_OK, f"worklist store upgraded from schema revision 0002 to {HEAD_REVISION}\n")
    assert look(url)["revision"] == [(HEAD_REVISION,)]
    code, out, _ = cli(capsys, "show", "--out", tmp_path)
    assert code == EXIT_OK and "(4 stored" in out


def test_db_upgrade_makes_no_store_unless_asked(capsys, tmp_path):
    path = tmp_path / "worklist.sqlite"
    code, out, err = cli(capsys, "db", "upgrade", "--out", tmp_path)
    assert (code, out, err) == (EXIT_BAD_INPUT, "", f"cardiosieve: error: no worklist database at {path}\n")
    code, _, err = cli(capsys, "db", "upgrade", "--db", f"sqlite:///{tmp_path / 'typo' / 'worklist.sqlite'}",
                       "--create")
    assert code == EXIT_BAD_INPUT and "does not exist" in err     # --create makes a file, not folders
    assert not path.exists() and not (tmp_path / "typo").exists()
    path.touch()                                                 # an empty file: no store in it
    code, _, err = cli(capsys, "db", "upgrade", "--out", tmp_path)
    assert code == EXIT_BAD_INPUT and "no worklist store" in err and "--create" in err

    assert cli(capsys, "db", "upgrade", "--out", tmp_path, "--create")[:2] == (
        EXIT_OK, f"worklist store created at schema revision {HEAD_REVISION}\n")
    assert read_items(open_store(f"sqlite:///{path}", create=False)).empty


def test_db_current_on_a_missing_or_newer_store_exits_2(capsys, tmp_path):
    code, out, err = cli(capsys, "db", "current", "--out", tmp_path)
    assert (code, out) == (EXIT_BAD_INPUT, "") and "no worklist database" in err
    url = f"sqlite:///{tmp_path / 'worklist.sqlite'}"
    engine = open_store(url)
    newer = f"{SCHEMA_VERSION + 1:04d}"
    with engine.begin() as conn:
        conn.exec_driver_sql(f"UPDATE {VERSION_TABLE} SET version_num = '{newer}'")
    engine.dispose()
    code, out, err = cli(capsys, "db", "current", "--db", url)
    assert (code, out) == (EXIT_BAD_INPUT, f"{newer}\n") and err.endswith("upgrade cardiosieve\n")
    code, out, err = cli(capsys, "db", "upgrade", "--db", url)
    assert (code, out) == (EXIT_BAD_INPUT, "") and "newer" in err and err.count("\n") == 1


def test_db_needs_a_sub_command_and_a_store(capsys, tmp_path):
    code, out, _ = cli(capsys, "db")
    assert code == EXIT_BAD_INPUT and "upgrade" in out and "current" in out
    with pytest.raises(SystemExit) as caught:      # argparse: --db or --out is required
        main(["db", "upgrade"])
    assert caught.value.code == 2


def test_the_db_module_imports_only_the_standard_library_at_start_up():
    code = ("import sys, cardiosieve.pipeline.dbcommands; "
            "print(sorted(m for m in ('pandas', 'numpy', 'sqlalchemy', 'alembic') if m in sys.modules))")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert done.stdout.strip() == "[]"
