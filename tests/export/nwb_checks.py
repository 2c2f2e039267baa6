"""Reading an exported NWB file back and checking it against the database it came from."""

from __future__ import annotations

import json
import math
import sqlite3
from pathlib import Path
from typing import Any

from pynwb import NWBHDF5IO, validate

from server.store import rows


def same(stored: Any, exported: Any) -> bool:
    """An exported value stands for the stored one: None as NaN (numbers) or "" (text)."""
    if isinstance(exported, bytes):
        exported = exported.decode()
    if stored is None:
        return exported == "" or (isinstance(exported, float) and math.isnan(exported))
    if isinstance(exported, float) and math.isnan(exported):
        return False
    return stored == exported


def column(table, name: str) -> list:
    return [v.item() if hasattr(v, "item") else v for v in table[name].data[:]]


def check_file(db: Path, path: Path, session_id: int) -> dict[str, Any]:
    """Validate the file with pynwb's own validator, read it back with NWBHDF5IO and compare
    every trial and every event with the database; returns what was compared."""
    assert validate(path=str(path)) == [], f"{path} does not validate"
    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    conn.row_factory = sqlite3.Row
    with NWBHDF5IO(str(path), "r") as io:
        nwb = io.read()
        session = dict(conn.execute("SELECT * FROM sessions WHERE id = ?", (session_id,)).fetchone())
        assert nwb.session_id == str(session_id)
        assert nwb.session_start_time.isoformat(timespec="milliseconds") == session["started_at"]
        assert nwb.subject.subject_id == session["animal"]
        notes = json.loads(nwb.notes)
        assert notes["end_reason"] == session["end_reason"]
        assert notes["protocol_sha256"] == session["protocol_sha256"]

        trials = [
            dict(r) for r in conn.execute("SELECT * FROM trials WHERE session_id = ? ORDER BY trial", (session_id,))
        ]
        if trials:
            table = nwb.trials
            assert len(table) == len(trials)
            assert column(table, "start_time") == [t["t_start"] for t in trials]
            assert column(table, "stop_time") == [t["t_end"] for t in trials]
            for name in trials[0]:
                if name in ("session_id", "t_start", "t_end"):
                    continue
                exported = column(table, name)
                stored = [t[name] for t in trials]
                if name in rows.BOOL_COLUMNS:
                    stored = [None if v is None else bool(v) for v in stored]
                bad = [(s, e) for s, e in zip(stored, exported) if not same(s, e)]
                assert not bad, f"trials column {name}: {bad[:3]}"
            for t, i in zip(trials, range(len(trials))):
                for key, count in json.loads(t["counts"]).items():
                    assert table[f"counts.{key}"].data[i] == count
        else:
            assert nwb.trials is None

        events = [dict(r) for r in conn.execute("SELECT * FROM events WHERE session_id = ? ORDER BY id", (session_id,))]
        exported_events = 0
        for kind in {e["kind"] for e in events}:
            mine = [e for e in events if e["kind"] == kind]
            table = nwb.events[f"{kind}_events"]
            exported_events += len(table)
            assert list(table.id.data[:]) == [e["id"] for e in mine]
            assert column(table, "timestamp") == [e["t"] for e in mine]
            assert all(same(e["value"], v) for e, v in zip(mine, column(table, "value")))
            assert column(table, "device_t_us") == [-1 if e["device_t_us"] is None else e["device_t_us"] for e in mine]
            assert column(table, "device_seq") == [-1 if e["device_seq"] is None else e["device_seq"] for e in mine]
            assert all(same(e["detail"], v) for e, v in zip(mine, column(table, "detail")))
        assert exported_events == len(events)

        wiring = json.loads(session["settings"]).get("wiring", {})
        sync = [n for n, k in wiring.get("outputs", {}).items() if k == "sync"]
        for name in sync:
            series = nwb.acquisition[f"sync_pulses_{name}"]
            pulses = [e for e in events if e["kind"] == "pulse" and e["name"] == name and e["value"] is not None]
            assert list(series.timestamps[:]) == [p["t"] for p in pulses]
            assert list(series.data[:]) == [p["value"] / 1000 for p in pulses]

        blocks = conn.execute("SELECT t_start FROM blocks WHERE session_id = ? ORDER BY block_index", (session_id,))
        assert column(nwb.intervals["blocks"], "start_time") == [b[0] for b in blocks]
        firings = conn.execute("SELECT t, rule FROM rule_firings WHERE session_id = ? ORDER BY t, id", (session_id,))
        firings = [tuple(f) for f in firings]
        if firings:
            table = nwb.events["rule_firings"]
            assert list(zip(column(table, "timestamp"), column(table, "rule"))) == firings
        estimates = [
            json.loads(r[0])
            for r in conn.execute("SELECT data FROM estimates WHERE session_id = ? ORDER BY trial", (session_id,))
        ]
        if estimates:
            table = nwb.processing["learning_model"]["estimates"]
            assert len(table) == len(estimates)
            for p in estimates[0]["params"]:
                for q in ("mean", "low", "high"):
                    assert column(table, f"params.{p}.{q}") == [e["params"][p][q] for e in estimates]
        else:
            assert "learning_model" not in nwb.processing
        return {
            "trials": len(trials),
            "events": len(events),
            "subject": {k: getattr(nwb.subject, k) for k in ("species", "strain", "sex", "age", "date_of_birth")},
            "notes": notes,
            "protocol": nwb.protocol,
            "sync": sync,
            "firings": len(firings),
            "annotations": None if "annotations" not in nwb.events else column(nwb.events["annotations"], "text"),
            "annotation_t": None if "annotations" not in nwb.events else column(nwb.events["annotations"], "timestamp"),
            "kinds": sorted(nwb.events),
        }
