"""Store safety: only crankbeat stores are written, damaged ones are refused, read-only works.

Real SQLite files throughout; the read-only mount is a real tmpfs remounted read-only (skipped
where mounting is not allowed).
"""

from __future__ import annotations

import hashlib
import shutil
import sqlite3
import subprocess
from pathlib import Path

import pytest
from test_store_fill import fill_run, make_events

from crankbeat.errors import StoreError
from crankbeat.logger.cli.main import main
from crankbeat.logger.store import Store

ROOT = Path(__file__).resolve().parent.parent
SHORT = ROOT / "fixtures" / "blf" / "blf.blf"


def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _short() -> Path:
    if not SHORT.is_file():
        pytest.skip("fixtures/blf is missing (make fixtures)")
    return SHORT


def test_another_programs_sqlite_file_is_left_unchanged(tmp_path, capsys):
    other = tmp_path / "inventory.sqlite"
    conn = sqlite3.connect(other)
    conn.execute("CREATE TABLE parts (name TEXT, qty INTEGER)")
    conn.execute("INSERT INTO parts VALUES ('spark plug', 4)")
    conn.commit()
    conn.close()
    before = _digest(other)
    code = main(["replay", "--rig", "larch", "--can", str(_short()), "--store", str(other)])
    err = capsys.readouterr()[1]
    assert code == 5 and err.count("\n") == 1
    assert "not a crankbeat store" in err and "parts" in err and "left unchanged" in err
    assert _digest(other) == before
    assert not Path(f"{other}-wal").exists()
    conn = sqlite3.connect(other)
    try:
        # SQLite's own answer: still in its rollback-journal mode, not switched to WAL
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "delete"
    finally:
        conn.close()


def _damage(db: Path) -> None:
    """Overwrite the middle pages of a store (a bad sector, a cut copy)."""
    data = bytearray(db.read_bytes())
    page = 4096
    for k in range(2, len(data) // page - 1, 3):
        data[k * page + 8:(k + 1) * page] = b"\xa5" * (page - 8)
    db.write_bytes(bytes(data))


def test_damaged_store_is_refused_for_writing(tmp_path, capsys):
    db = tmp_path / "r.db"
    with Store.open(db) as st:
        fill_run(st, make_events(3000))
        st.db.conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    _damage(db)
    before = _digest(db)
    code = main(["replay", "--rig", "larch", "--can", str(_short()), "--store", str(db),
                 "--force"])
    err = capsys.readouterr()[1]
    assert code == 5 and err.count("\n") == 1 and "damaged" in err, err
    assert _digest(db) == before
    with pytest.raises(StoreError, match="damaged"):
        Store.open(db, create=True)


@pytest.fixture
def read_only_mount(tmp_path):
    mnt = tmp_path / "mnt"
    mnt.mkdir()
    if subprocess.run(["mount", "-t", "tmpfs", "-o", "size=4m", "tmpfs", str(mnt)],
                      capture_output=True).returncode != 0:
        pytest.skip("cannot mount a tmpfs here (needs root in a container that allows it)")
    try:
        yield mnt
    finally:
        subprocess.run(["umount", str(mnt)], capture_output=True)


def test_store_on_a_read_only_mount_answers_queries(tmp_path, read_only_mount, capsys):
    src = tmp_path / "r.db"
    with Store.open(src) as st:
        run = fill_run(st, make_events(500), label="on-ro")
    db = read_only_mount / "r.db"
    shutil.copy(src, db)
    assert subprocess.run(["mount", "-o", "remount,ro", str(read_only_mount)]).returncode == 0
    assert main(["runs", "--store", str(db)]) == 0
    out = capsys.readouterr()[0]
    assert "on-ro" in out
    with Store.open(db, create=False) as st:
        assert st.read_only and len(st.events(run)) == 1000
    code = main(["replay", "--rig", "larch", "--can", str(_short()), "--store", str(db)])
    err = capsys.readouterr()[1]
    assert code == 5 and err.count("\n") == 1 and "read-only" in err
