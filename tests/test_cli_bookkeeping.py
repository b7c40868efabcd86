"""Run bookkeeping from the command line: tags, delete, which run "last" is, input checks."""

from __future__ import annotations

import json

import pytest
from test_store_fill import fill_run, make_events

from crankbeat.logger.cli.main import main
from crankbeat.logger.store import SCHEMA_VERSION, Store


def cli(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture
def db(tmp_path):
    path = tmp_path / "b.db"
    with Store.open(path) as st:
        for seed, every in ((1, 20), (2, 10), (3, 5)):
            fill_run(st, make_events(300, misfire_every={2: every}, seed=seed))
    return str(path)


def test_tags_set_list_remove_and_filter_a_trend(db, capsys):
    assert cli(capsys, "tag", "1", "tyre=old", "fuel=95", "--store", db)[1] == \
        "run 1: fuel=95 tyre=old\n"
    cli(capsys, "tag", "3", "tyre=new", "--store", db)
    cli(capsys, "tag", "2", "tyre=new", "--store", db)
    code, out, _ = cli(capsys, "trend", "misfire_rate", "--cylinder", "2", "--tag", "tyre=new",
                       "--json", "--store", db)
    points = json.loads(out)
    assert code == 0 and [p["run_id"] for p in points] == [2, 3]
    # every 10th and every 5th cycle of cylinder 2 misfire: 10 % and 20 % (by construction)
    assert [round(p["value"], 6) for p in points] == [10.0, 20.0]
    assert cli(capsys, "tag", "1", "--remove", "fuel", "--store", db)[1] == "run 1: tyre=old\n"
    code, _, err = cli(capsys, "tag", "1", "tyre", "--store", db)
    assert code == 2 and err.startswith("error: bad tag 'tyre'") and err.count("\n") == 1


def test_delete_removes_every_row_of_the_run(db, capsys):
    cli(capsys, "tag", "2", "bike=larch-2", "--store", db)
    code, _, err = cli(capsys, "delete", "2", "--store", db)
    assert code == 2 and "--yes" in err
    code, out, _ = cli(capsys, "delete", "2", "--yes", "--store", db)
    assert code == 0 and out == "run 2 deleted (600 events)\n"
    with Store.open(db) as st:
        assert [r["id"] for r in st.runs()] == [1, 3]
        for table in ("events", "run_tags", "windows", "intervals", "vibration", "sources"):
            assert st.db.execute(f"SELECT COUNT(*) FROM {table} WHERE run = 2").fetchone()[0] == 0
        assert st.schema_version == SCHEMA_VERSION
    code, _, err = cli(capsys, "show", "2", "--store", db)
    assert code == 5 and "no run 2" in err


def test_a_failed_replay_does_not_become_last(db, tmp_path, capsys):
    bad = tmp_path / "bad.log"
    bad.write_text("this is not a candump log\n" * 3)
    code, _, err = cli(capsys, "replay", "--rig", "larch", "--can", str(bad), "--store", db)
    with Store.open(db) as st:
        newest = max(r["id"] for r in st.runs())
        assert st.resolve_run("last") == 3  # whatever the failed replay left, it holds no events
    assert newest >= 3
    code, out, _ = cli(capsys, "show", "last", "--store", db)
    assert code == 0 and out.startswith("run 3 ")


def test_input_checks_give_one_line_and_a_usage_exit(db, tmp_path, capsys):
    code, out, err = cli(capsys, "events", "last", "--cylinder", "5", "--store", db)
    assert (code, out) == (2, "")
    assert err == "error: --cylinder 5: run 3 is of a 2-cylinder engine (cylinders 1..2)\n"
    code, _, err = cli(capsys, "synth", "--misfire-cylinder", "3", "--out", str(tmp_path / "s"))
    assert code == 2 and err == "error: misfire cylinder 3: rig 'larch' has 2 cylinders (1..2)\n"
    code, _, err = cli(capsys, "synth", "--rpm", "20000", "--out", str(tmp_path / "s"))
    assert code == 2 and "20000 rpm is above the rev limit of rig 'larch' (10500 rpm" in err
    assert not (tmp_path / "s").exists()  # nothing written for a refused scenario
    code, out, _ = cli(capsys, "--version")
    assert code == 0 and out.startswith("crankbeat ")


def test_help_names_the_larch_and_the_new_commands(capsys):
    code, out, _ = cli(capsys, "--help")
    assert code == 0 and "larch" in out
    for command in ("tag", "delete"):
        assert f"    {command} " in out
