"""What a lab-wide store costs a rig, and how fast a backlog drains after an outage.

On a throwaway PostgreSQL cluster (tests/pg_server.py, a private unix socket) prints:
(a) a trial committed on the rig: the plain SQLite store (the baseline, same run) against the
spool, which also keeps each write in its outbox; (b) events per second through each;
(c) forwarding: outbox entries per second into PostgreSQL, and the time to drain the backlog of
a 30 s outage of 32 boxes at `--rate` events per box per second; (d) how long an event takes
from the lab's writer thread to the server while it is reachable (the promise: within a
second); (e) a trial committed on PostgreSQL directly, for scale.

    python bench/lab_store.py [--boxes 32] [--rate 5] [--outage 30] [--trials 300]
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))
sys.path.insert(0, str(ROOT / "tests" / "store"))

from machine import where_run  # noqa: E402
from pg_server import start_cluster  # noqa: E402
from store_samples import STARTED_AT, make_trial  # noqa: E402

from server.engine.records import EventLogged  # noqa: E402
from server.store.lab_store import open_lab_store  # noqa: E402
from server.store.writer import Store  # noqa: E402


def begin(store: Store) -> int:
    return store.begin_session("rack-9", "RN-0999", "flip-flop", None, None, 3, STARTED_AT)


def trial_ms(store: Store, n: int) -> float:
    """Median wall time of one trial commit (with the 3 events before it), in ms."""
    sid = begin(store)
    times = []
    for k in range(1, n + 1):
        for e in range(3):
            store.write(sid, EventLogged(t=k * 20.0 + e, kind="input", name="lever_left", value=1.0))
        t0 = time.perf_counter()
        store.write(sid, make_trial(k))
        times.append(time.perf_counter() - t0)
    return 1000 * statistics.median(times)


def events_per_s(store: Store, n: int) -> float:
    sid = begin(store)
    t0 = time.perf_counter()
    for k in range(n):
        store.write(sid, EventLogged(t=k * 0.01, kind="input", name="nose_poke", value=1.0, device_seq=k + 1))
        if k % 250 == 249:
            store.flush()
    store.flush()
    return n / (time.perf_counter() - t0)


def event_to_server_s(spool: Store, forwarder, n: int) -> list[float]:
    """Seconds from handing an event to the lab's writer thread until the server has it."""
    from server.store.background import BackgroundWriter
    from server.store.postgres import connect

    writer = BackgroundWriter(spool, say=lambda text: None)
    writer.start()
    forwarder.start()
    check = connect(forwarder.url)
    with writer.direct() as store:
        sid = begin(store)
    lags = []
    try:
        for k in range(n):
            t0 = time.perf_counter()
            writer.write(sid, EventLogged(t=float(k), kind="input", name="lever_right", value=1.0, device_seq=k + 1))
            while not check.execute(
                "SELECT 1 FROM events WHERE session_id = ? AND device_seq = ?", (sid, k + 1)
            ).fetchone():
                time.sleep(0.005)
            lags.append(time.perf_counter() - t0)
            time.sleep(0.1 + (k % 7) * 0.03)  # at varying points of the writer's and forwarder's cycles
    finally:
        check.close()
        writer.close()
    return lags


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--boxes", type=int, default=32)
    ap.add_argument("--rate", type=float, default=5.0, help="events per box per second")
    ap.add_argument("--outage", type=float, default=30.0, help="seconds the server was away")
    ap.add_argument("--trials", type=int, default=300)
    ap.add_argument("--events", type=int, default=40, help="events timed from the rig to the server")
    args = ap.parse_args()
    print(where_run())
    cluster = start_cluster()
    try:
        with tempfile.TemporaryDirectory() as folder:
            tmp = Path(folder)
            plain = Store.open(tmp / "plain.sqlite")
            spool, forwarder = open_lab_store(cluster.fresh_schema("bench"), rig="bench", spool=tmp / "spool.sqlite")
            assert forwarder is not None
            plain_ms, spool_ms = trial_ms(plain, args.trials), trial_ms(spool, args.trials)
            print(f"(a) trial commit on the rig, median: SQLite {plain_ms:.3f} ms, spool {spool_ms:.3f} ms "
                  f"(x{spool_ms / plain_ms:.2f})")  # fmt: skip
            n = 20_000
            plain_eps, spool_eps = events_per_s(plain, n), events_per_s(spool, n)
            print(f"(b) events/s in batches of 250: SQLite {plain_eps:,.0f}, spool {spool_eps:,.0f} "
                  f"(x{spool_eps / plain_eps:.2f})")  # fmt: skip
            forwarder.pass_once()  # everything so far: forwarded, the mark set
            backlog = int(args.boxes * args.rate * args.outage)
            sid = begin(spool)
            for k in range(backlog):
                spool.write(sid, EventLogged(t=k * 0.01, kind="input", name="head_entry", value=1.0, device_seq=k + 1))
            spool.flush()
            t0 = time.perf_counter()
            sent = forwarder.pass_once()
            drain = time.perf_counter() - t0
            print(f"(c) forwarding: {sent:,} entries in {drain:.2f} s = {sent / drain:,.0f} entries/s; "
                  f"a {args.outage:g} s outage of {args.boxes} boxes at {args.rate:g} events/s each "
                  f"({backlog:,} entries) drains in {drain:.2f} s")  # fmt: skip
            lags = event_to_server_s(spool, forwarder, args.events)
            print(f"(d) an event from the rig's writer thread to the server, while reachable: "
                  f"median {statistics.median(lags):.3f} s, max {max(lags):.3f} s over {len(lags)} events")  # fmt: skip
            forwarder.stop(drain_s=0)
            spool.close()
            plain.close()
            direct = Store.open(cluster.fresh_schema("direct"))
            direct_ms = trial_ms(direct, args.trials)
            print(f"(e) trial commit on PostgreSQL directly (unix socket; the throwaway cluster runs "
                  f"fsync=off), median: {direct_ms:.3f} ms (x{direct_ms / plain_ms:.2f} of SQLite)")  # fmt: skip
            direct.close()
    finally:
        cluster.remove()


if __name__ == "__main__":
    main()
