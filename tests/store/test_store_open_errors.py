"""An unusable database path is a one-line error before any session starts."""

from __future__ import annotations

import os
import shutil
import sqlite3
import subprocess

import pytest

from server.store import Store, StoreError
from server.store.queries import open_readonly


@pytest.fixture
def make_readonly():
    """Make a file or folder unwritable even for root (chattr +i), undone after the test."""
    locked = []

    def lock(path):
        if os.geteuid() != 0:
            os.chmod(path, 0o555 if path.is_dir() else 0o444)
            locked.append((path, "chmod"))
            return
        if shutil.which("chattr") is None:
            pytest.skip("running as root without chattr: cannot make a path read-only")
        done = subprocess.run(["chattr", "+i", str(path)], capture_output=True)
        if done.returncode != 0:
            pytest.skip("running as root on a file system without the immutable flag")
        locked.append((path, "chattr"))

    yield lock
    for path, how in locked:
        if how == "chattr":
            subprocess.run(["chattr", "-i", str(path)], check=True)
        else:
            os.chmod(path, 0o755 if path.is_dir() else 0o644)


def open_error(path) -> str:
    with pytest.raises(StoreError) as caught:
        Store.open(path)
    message = str(caught.value)
    assert "\n" not in message and message.startswith(f"cannot use database {path}: ")
    return message.removeprefix(f"cannot use database {path}: ")


def test_missing_folder(tmp_path):
    assert open_error(tmp_path / "no-such-room" / "lab.sqlite") == (
        f"folder {tmp_path / 'no-such-room'} does not exist"
    )


def test_folder_that_is_a_file(tmp_path):
    (tmp_path / "notes.txt").write_text("not a folder")
    assert open_error(tmp_path / "notes.txt" / "lab.sqlite") == (f"{tmp_path / 'notes.txt'} is not a folder")


def test_path_that_is_a_folder(tmp_path):
    (tmp_path / "lab.sqlite").mkdir()
    assert open_error(tmp_path / "lab.sqlite") == "it is a folder, not a file"


def test_read_only_folder_for_a_new_database(tmp_path, make_readonly):
    room = tmp_path / "room"
    room.mkdir()
    make_readonly(room)
    assert open_error(room / "lab.sqlite") == (f"folder {room} is not writable (permission denied)")


def test_read_only_folder_with_an_existing_database(tmp_path, make_readonly):
    # WAL needs to create its -wal and -shm files beside the database.
    room = tmp_path / "room"
    room.mkdir()
    Store.open(room / "lab.sqlite").close()
    for leftover in room.glob("lab.sqlite-*"):
        leftover.unlink()
    make_readonly(room)
    assert open_error(room / "lab.sqlite") == (f"folder {room} is not writable (permission denied)")


def test_read_only_database_file(db_path, make_readonly):
    Store.open(db_path).close()
    make_readonly(db_path)
    assert open_error(db_path) == "file is not writable (permission denied)"


def test_file_that_is_not_a_database(db_path):
    db_path.write_bytes(b"box,animal\nshelf-2/left,R-117\n" * 40)
    assert open_error(db_path) == "not an sqlite database"


def test_nothing_is_left_open_or_created_after_a_refusal(tmp_path):
    open_error(tmp_path / "gone" / "lab.sqlite")
    assert list(tmp_path.iterdir()) == []


def test_readers_get_clear_errors_too(tmp_path, db_path):
    with pytest.raises(StoreError, match=r"^cannot read database .*: no such file$"):
        open_readonly(tmp_path / "missing.sqlite")
    conn = sqlite3.connect(db_path)
    conn.execute("CREATE TABLE inventory (item TEXT)")
    conn.commit()
    conn.close()
    with pytest.raises(StoreError, match=r"^cannot read database .*: not a vigil database$"):
        open_readonly(db_path)
