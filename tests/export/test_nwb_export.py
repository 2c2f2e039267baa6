"""`vigil export --nwb`: every file passes pynwb's validator and reads back to the database
(the `exported` fixture checks each file; the tests look at what it saw)."""

from __future__ import annotations

import csv
import hashlib
import io
import json
import shutil

import h5py
import pytest
from nwb_samples import SUBJECT
from pynwb import NWBHDF5IO

from server.cli import main
from server.export import nwb as nwb_module
from server.export.nwb import export_nwb, file_name
from server.store import StoreError, csv_exports, queries
from server.store.writer import Store


def test_reversal_sessions_carry_everything(stored_lab, exported):
    for sid in (stored_lab["first"], stored_lab["second"]):
        seen = exported[sid]
        assert seen["trials"] > 20 and seen["events"] > 500
        assert seen["firings"] > 0, "the reversal protocol's rules fire within 12 minutes"
        assert seen["sync"] == ["ephys_mark"]
        assert {k: v for k, v in seen["subject"].items() if v is not None} == SUBJECT
        assert {"input_events", "output_events", "pulse_events", "step_events", "block_events"} <= set(seen["kinds"])
        assert seen["notes"]["end_reason"] == "session time limit"


def test_an_animal_with_several_sessions_exports_one_file_each(stored_lab, exported, tmp_path, capsys):
    out = tmp_path / "nwb"
    assert main(["export", "--nwb", str(out), "--db", str(stored_lab["path"]), "--animal", "RN-0501"]) == 0
    printed = [line.split(":")[0] for line in capsys.readouterr().out.splitlines()]
    assert printed == [f"session {stored_lab['first']}", f"session {stored_lab['second']}"]  # oldest first
    names = sorted(f.name for f in out.iterdir())
    assert names == sorted(file_name("RN-0501", sid) for sid in (stored_lab["first"], stored_lab["second"]))
    for sid in (stored_lab["first"], stored_lab["second"]):
        # Read with h5py alone (the full read-back is the `exported` fixture's): the same
        # session gets the same identifier and trials however it is exported.
        with h5py.File(out / file_name("RN-0501", sid), "r") as mine, h5py.File(exported[sid]["path"], "r") as all_:
            assert mine["identifier"][()] == all_["identifier"][()]
            assert len(mine["intervals/trials/id"]) == exported[sid]["trials"]


def test_protocol_text_and_its_sha256_travel_with_the_file(stored_lab, exported):
    seen = exported[stored_lab["first"]]
    text = open(seen["notes"]["protocol_path"], encoding="utf-8").read()
    assert seen["protocol"] == text
    # hashlib as the outside reference for the digest the session stored at its start
    assert seen["notes"]["protocol_sha256"] == hashlib.sha256(text.encode("utf-8")).hexdigest()
    assert seen["notes"]["protocol_text"] == "included in /general/protocol"
    assert seen["notes"]["seed"] == 11


def test_notes_with_and_without_session_time(stored_lab, exported):
    seen = exported[stored_lab["first"]]
    assert seen["annotations"] == ["bedding changed before the session", "looked sleepy"]
    assert seen["annotation_t"] == [12.5, 600.0]  # 09:10 is ten minutes after the 09:00 start
    assert exported[stored_lab["second"]]["annotations"] is None


def test_a_database_without_subject_keys_still_exports(stored_lab, exported):
    seen = exported[stored_lab["pav"]]
    assert set(seen["subject"].values()) == {None}
    assert seen["sync"] == ["ephys_mark"] and seen["trials"] > 5
    assert "learning_model" not in seen["kinds"]


def test_a_protocol_file_changed_since_the_session_is_not_passed_off_as_it(stored_lab, exported, tmp_path):
    db = tmp_path / "copy.sqlite"
    shutil.copy(stored_lab["path"], db)
    protocol = tmp_path / "reversal.yaml"
    shutil.copy(exported[stored_lab["first"]]["notes"]["protocol_path"], protocol)
    with Store.open(db) as store:  # point the session at a copy of its protocol, then edit the copy
        store.conn.execute("UPDATE sessions SET protocol_path = ? WHERE id = ?", (str(protocol), stored_lab["first"]))
    protocol.write_text(protocol.read_text(encoding="utf-8") + "\n# edited later\n", encoding="utf-8")
    (done,) = export_nwb(db, tmp_path / "out", session_id=stored_lab["first"])
    with NWBHDF5IO(str(done.path), "r") as nwb_io:
        nwb = nwb_io.read()
        assert nwb.protocol is None
        assert json.loads(nwb.notes)["protocol_text"].startswith("file changed since the session")
    # A file gone since is said so too (the same reading, without writing a file).
    protocol.unlink()
    text, state = nwb_module._protocol_text({"protocol_path": str(protocol), "protocol_sha256": "00" * 32})
    assert text is None and state.startswith("file not readable at export")


def test_unknown_session_or_animal_is_one_line(stored_lab, tmp_path, capsys):
    assert main(["export", "--nwb", str(tmp_path), "--db", str(stored_lab["path"]), "--session", "999"]) == 1
    assert capsys.readouterr().err == "vigil: no session 999 in the database\n"
    with pytest.raises(StoreError, match="no sessions of animal 'RN-9999'"):
        export_nwb(stored_lab["path"], tmp_path, animal="RN-9999")
    assert main(["export", "--nwb", str(tmp_path), "--db", str(tmp_path / "none.sqlite")]) == 1
    assert "no such file" in capsys.readouterr().err
    assert list(tmp_path.iterdir()) == []


def test_trial_columns_a_later_migration_adds_are_exported_too(stored_lab, tmp_path):
    """Columns are read from the table itself: two-stage columns (as a migration might add
    them) reach the NWB trials table and the trials CSV with no change to the export."""
    db = tmp_path / "two_stage.sqlite"
    shutil.copy(stored_lab["path"], db)
    sid = stored_lab["second"]
    with Store.open(db) as store:
        conn = store.conn
        for sql in (
            "ALTER TABLE trials ADD COLUMN second_state TEXT",
            "ALTER TABLE trials ADD COLUMN second_common INTEGER",
            "ALTER TABLE trials ADD COLUMN second_latency_s REAL",
        ):
            conn.execute(sql)
        conn.execute(
            "UPDATE trials SET second_state = CASE WHEN trial % 2 THEN 'left_room' ELSE 'right_room' END,"
            " second_common = trial % 3 > 0, second_latency_s = 0.25 + trial / 1000.0"
            " WHERE session_id = ? AND trial > 1",
            (sid,),
        )
    (done,) = export_nwb(db, tmp_path / "out", session_id=sid)
    with NWBHDF5IO(str(done.path), "r") as nwb_io:
        trials = nwb_io.read().trials
        states = [v.decode() if isinstance(v, bytes) else v for v in trials["second_state"].data[:]]
        assert states[:3] == ["", "right_room", "left_room"]  # trial 1 has none: empty text
        latency = list(trials["second_latency_s"].data[:])
        assert latency[1:3] == [0.25 + 2 / 1000.0, 0.25 + 3 / 1000.0] and latency[0] != latency[0]  # NaN
        assert list(trials["second_common"].data[:3])[1:] == [1.0, 0.0]
    out = io.StringIO()
    conn = queries.open_readonly(db)
    csv_exports.export_trials_csv(conn, sid, out)
    conn.close()
    row = next(r for r in csv.DictReader(io.StringIO(out.getvalue())) if r["trial"] == "2")
    assert (row["second_state"], row["second_common"], row["second_latency_s"]) == ("right_room", "1", "0.252")
