"""How long `vigil export --nwb` takes for one long session.

The session: the reversal protocol run closed loop in virtual time (q_learner virtual
animal, the online estimator and rules on, every event logged as the live lab logs it),
its limits lifted so it reaches about 2,000 trials, written to a fresh database by the
real store. Then, each `--repeats` times:

1. export: `export_nwb` of that session (query, build, write the HDF5 file);
2. validate: pynwb's own validator over the file;
3. read back: NWBHDF5IO read plus every trials and events column loaded;
4. baseline in the same run: the trials and events CSV downloads of the same session
   (`server.store.csv_exports`), the export a lab had before; export / baseline is the
   ratio that survives a noisy machine.

    python bench/export.py [--trials 2000] [--repeats 3] [--json]

(about 14 events a trial: --trials 3600 gives about 50,000 events)
"""

from __future__ import annotations

import argparse
import dataclasses
import io
import json
import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
import pynwb  # noqa: E402
from machine import where_run  # noqa: E402  (bench/ is on sys.path when run as a script)

from hardware_stubs.agents import make_agent  # noqa: E402
from hardware_stubs.emulated_box import EmulatedBox  # noqa: E402
from server.engine.caps import HardCaps  # noqa: E402
from server.engine.virtual import run_virtual  # noqa: E402
from server.export.nwb import export_nwb  # noqa: E402
from server.lab.assembly import build_session  # noqa: E402
from server.protocol.load import load_protocol  # noqa: E402
from server.store import csv_exports, queries  # noqa: E402
from server.store.writer import Store  # noqa: E402

PROTOCOL = ROOT / "protocols" / "reversal.yaml"
TRIALS_PER_MINUTE = 5.0  # about what the reversal protocol gives with a q_learner


def long_session(db: Path, trials: int, seed: int = 5) -> int:
    """Store one closed-loop session of about `trials` trials; return its id."""
    protocol = load_protocol(PROTOCOL)
    minutes = 1.5 * trials / TRIALS_PER_MINUTE  # time to spare: `max_trials` ends the session
    limits = dataclasses.replace(protocol.limits, max_minutes=minutes, max_rewards=10 * trials, max_trials=trials)
    protocol = dataclasses.replace(protocol, limits=limits)
    caps = HardCaps(max_rewards=10 * trials, max_minutes=minutes + 1)
    session = build_session(protocol, seed, caps)
    box = EmulatedBox(protocol.wiring, make_agent("q_learner", alpha=0.3, beta=5.0), np.random.default_rng(seed))
    settings = {
        "subject": {"species": "Rattus norvegicus", "sex": "F", "age": "P12W"},
        "wiring": {
            "inputs": {n: line.kind for n, line in protocol.wiring.inputs.items()},
            "outputs": {n: line.kind for n, line in protocol.wiring.outputs.items()},
        },
    }
    with Store.open(db) as store:
        sid = store.begin_session(
            "bench-1", "BN-0001", protocol.name, str(PROTOCOL), protocol.sha256, seed,
            "2031-06-01T20:00:00.000+02:00", settings,
        )  # fmt: skip

        def keep(records):
            for record in records:
                store.write(sid, record)

        run_virtual(session, box, keep)
        store.flush()
    return sid


def read_back(path: Path) -> tuple[int, int]:
    with pynwb.NWBHDF5IO(str(path), "r") as nwb_io:
        nwb = nwb_io.read()
        for name in nwb.trials.colnames:
            nwb.trials[name].data[:]
        events = 0
        for name, table in nwb.events.items():
            for column in table.colnames:
                table[column].data[:]
            events += len(table) if name.endswith("_events") else 0  # not rule_firings, annotations
        return len(nwb.trials), events


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trials", type=int, default=2000)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--json", action="store_true")
    args = parser.parse_args()

    with tempfile.TemporaryDirectory(prefix="vigil-bench-export-") as folder:
        db = Path(folder) / "long.sqlite"
        t0 = time.perf_counter()
        sid = long_session(db, args.trials)
        build_s = time.perf_counter() - t0
        conn = queries.open_readonly(db)
        n_trials, n_events = (conn.execute(f"SELECT count(*) FROM {t} WHERE session_id = ?", (sid,)).fetchone()[0]
                              for t in ("trials", "events"))  # fmt: skip
        figures: dict[str, list[float]] = {"export_s": [], "validate_s": [], "read_back_s": [], "csv_baseline_s": []}
        for i in range(args.repeats):
            t0 = time.perf_counter()
            (done,) = export_nwb(db, Path(folder) / f"nwb-{i}", session_id=sid)
            figures["export_s"].append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            problems = pynwb.validate(path=str(done.path))
            figures["validate_s"].append(time.perf_counter() - t0)
            assert problems == [], problems
            t0 = time.perf_counter()
            assert read_back(done.path) == (n_trials, n_events)
            figures["read_back_s"].append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            csv_exports.export_trials_csv(conn, sid, io.StringIO())
            csv_exports.export_events_csv(conn, sid, io.StringIO())
            figures["csv_baseline_s"].append(time.perf_counter() - t0)
        size_mb = done.path.stat().st_size / 1e6
        conn.close()

    medians = {k: statistics.median(v) for k, v in figures.items()}
    result = {
        "trials": n_trials,
        "events": n_events,
        "session_build_s": round(build_s, 2),
        **{k: round(v, 3) for k, v in medians.items()},
        "export_over_csv": round(medians["export_s"] / medians["csv_baseline_s"], 1),
        "file_mb": round(size_mb, 2),
        "pynwb": pynwb.__version__,
    }
    if args.json:
        print(json.dumps(result))
        return
    print(f"machine: {where_run()}, pynwb {pynwb.__version__}")
    print(f"session: {n_trials} trials, {n_events} events (built and stored in {build_s:.1f} s)")
    print(f"median of {args.repeats}:")
    print(f"  export to NWB     {medians['export_s']:7.3f} s   ({size_mb:.1f} MB file)")
    print(f"  pynwb validate    {medians['validate_s']:7.3f} s")
    print(f"  read back (all)   {medians['read_back_s']:7.3f} s")
    print(f"  CSV baseline      {medians['csv_baseline_s']:7.3f} s   (trials + events CSV of the same session)")
    print(f"  export / baseline {result['export_over_csv']:7.1f} x")


if __name__ == "__main__":
    main()
