"""The night, proven: many emulated boxes with faults for hours, then a 12-hour night in virtual time.

Part 1 (wall time): N emulated boxes (default 32), each a box process on a pty as `vigil run`
starts them, every one with faults: the cable pulled every 20 s for 2 s, 2 % of lines
dropped (both ways) and 2 % preceded by garbage. The lab runs in this process exactly as
`vigil run` runs it (serial links, live drivers, sessions, the store's writer thread, the
alarm watch), into a SQLite file. Figures:

- resident memory of the lab process after the warm-up and at the end (growth <= 5 %; the bench
  keeps only the current slice's samples, so what grows is the lab's), and
  its open file descriptors (flat: the same at the end as after the warm-up);
- closed-loop latency per slice (default 10 min): from the moment a box's input happened
  (device clock, mapped to the host's) to the moment its session took it, p50/p99 per slice
  and the p99's trend (least-squares slope, ms per hour). Inputs replayed after a pulled
  cable (taken more than 1 s late) are counted apart: they waited for the cable;
- p99 of the direct path too: inputs taken within 50 ms (the rest waited for the replay
  of a dropped line, which the box is asked for after 0.5 s);
- nothing lost or duplicated: per session, the trials stored are 1..n with n the trials the
  session counted and every trial record it produced; the device events stored are every
  one the link handed over, once, with sequence numbers contiguous up to the newest the
  box itself reported (its beats carry its last written number). A dropped line just
  before the end is asked for again before the link closes, so it counts as lost if it is
  missing; only events written while the cable was out at the very end are counted apart
  ("not received when the sessions ended": they are still on the box).

Part 2 (virtual time): the same boxes' protocol through the rehearsal path (virtual animals,
sessions built as the live lab builds them with every event logged), a 12-hour night for
each of 8 boxes one after another, every record written to a SQLite store; resident memory
after the first box's night and after the last (the same <= 5 % check).

    python bench/soak.py [--boxes 32] [--minutes 120] [--slice-minutes 10] [--night-hours 12]
                         [--no-night] [--json] [--keep]

The figures go to stdout; `--json` prints one line with everything. Exit 1 when a check fails.
"""

from __future__ import annotations

import argparse
import asyncio
import ctypes
import ctypes.util
import json
import os
import shutil
import sqlite3
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
from machine import where_run  # noqa: E402  (bench/ is this script's folder)

FAULTS = {"unplug_every_s": 20.0, "unplug_for_s": 2.0, "drop_rate": 0.02, "garbage_rate": 0.02}
PROTOCOL = ROOT / "protocols" / "reversal.yaml"
REPLAYED_S = 1.0  # an input taken later than this waited for a pulled cable
LATE_MS = 50.0  # ... later than this, for the replay of a dropped line (or the machine)
MEMORY_GROWTH = 0.05


def rss_mb() -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    return float("nan")


class _MallInfo2(ctypes.Structure):
    _fields_ = [
        (name, ctypes.c_size_t)
        for name in ("arena", "ordblks", "smblks", "hblks", "hblkhd", "usmblks", "fsmblks", "uordblks", "fordblks",
                     "keepcost")
    ]  # fmt: skip


def memory_detail() -> dict:
    """Where the resident memory is: anonymous, file-backed (libraries, the WAL index) and
    C malloc's in-use and free bytes (glibc's mallinfo2, every arena), beside Python's blocks."""
    out: dict = {}
    for line in Path("/proc/self/status").read_text().splitlines():
        key, _, value = line.partition(":")
        if key in ("RssAnon", "RssFile", "RssShmem", "Threads"):
            out[key] = int(value.split()[0]) / 1024 if key != "Threads" else int(value)
    try:
        libc = ctypes.CDLL(None)
        libc.mallinfo2.restype = _MallInfo2
        mi = libc.mallinfo2()
        out["malloc_used"] = (mi.uordblks + mi.hblkhd) / 2**20
        out["malloc_free"] = mi.fordblks / 2**20
    except (AttributeError, OSError):  # not glibc
        pass
    try:  # the SQLite library Python's sqlite3 module links, when it is a shared one
        lib = ctypes.CDLL(ctypes.util.find_library("sqlite3") or "libsqlite3.so.0")
        lib.sqlite3_memory_used.restype = ctypes.c_int64
        out["sqlite"] = lib.sqlite3_memory_used() / 2**20
    except (AttributeError, OSError):
        pass
    out["py_blocks"] = sys.getallocatedblocks()
    return {k: round(v, 2) if isinstance(v, float) else v for k, v in out.items()}


def open_fds() -> int:
    return len(os.listdir("/proc/self/fd"))


def long_protocol(minutes: float):
    """The example reversal protocol with its own limits lifted past the run."""
    from server.protocol.load import load_protocol

    protocol = load_protocol(PROTOCOL)
    return replace(protocol, limits=replace(protocol.limits, max_minutes=minutes, max_rewards=10**7))


def percentiles(ms: list[float]) -> dict:
    if not ms:
        return {"n": 0, "p50_ms": None, "p99_ms": None}
    a = np.asarray(ms)
    return {"n": int(a.size), "p50_ms": round(float(np.percentile(a, 50)), 3),
            "p99_ms": round(float(np.percentile(a, 99)), 3)}  # fmt: skip


# ---------------------------------------------------------------- part 1: wall time


async def soak(boxes: int, minutes: float, slice_s: float, warmup_s: float) -> dict:
    import server.lab.supervisor as supervisor
    from server.engine.caps import HardCaps
    from server.lab.config import BoxConfig, LabConfig
    from server.lab.config_link import Emulation
    from server.lab.supervisor import Lab
    from server.store.writer import Store

    # (monotonic, ms from input to taken) and open descriptors, of the current slice only:
    # the bench keeps nothing that grows with the run, so the memory that grows is the lab's
    samples: list[tuple[float, float]] = []
    plain_live = supervisor.LiveSession

    class TimedQueue(asyncio.Queue):
        clock = staticmethod(lambda: 0.0)

        def _get(self):
            item = super()._get()
            if isinstance(item, tuple):
                samples.append((time.monotonic(), (self.clock() - item[1]) * 1000))
            return item

    class TimedLiveSession(plain_live):  # the driver's inbox, timed from input to taken
        def __init__(self, session, link, clock, publish):
            super().__init__(session, link, clock, publish)
            self.inbox = TimedQueue()
            self.inbox.clock = clock

    supervisor.LiveSession = TimedLiveSession
    protocol = long_protocol(minutes + 10)
    configs = tuple(
        BoxConfig(f"soak-{i + 1:02d}", f"SK-{i + 1:04d}", protocol,
                  emulate=Emulation("q_learner", 9100 + i, {"alpha": 0.3, "beta": 5.0}, dict(FAULTS)))
        for i in range(boxes)
    )  # fmt: skip
    folder = Path(tempfile.mkdtemp(prefix="vigil-soak-"))
    db = folder / "soak.sqlite"
    store = Store.open(db)
    config = LabConfig("soak", "soak bench", db, HardCaps(10**7, minutes + 10), configs)
    said: list[str] = []  # the first warnings the lab says (links lost and restored are not kept)

    def say(line: str) -> None:
        if line.startswith("warning") and len(said) < 10:
            said.append(line)

    lab = Lab(config, store, say=say)
    running = asyncio.create_task(lab.run())
    while len(lab.runs) < boxes and not running.done():
        await asyncio.sleep(0.1)
    began = time.monotonic()
    fds: list[tuple[float, int]] = []  # once a second: a pulled cable closes its pty for 2 s

    async def count_fds() -> None:
        while True:
            fds.append((time.monotonic(), open_fds()))
            await asyncio.sleep(1.0)

    counter = asyncio.create_task(count_fds())
    await asyncio.sleep(warmup_s)
    samples.clear()
    fds.clear()
    slices = []
    edge = time.monotonic()
    stop_at = began + minutes * 60
    while not running.done() and edge < stop_at - 1:
        await asyncio.wait([running], timeout=min(slice_s, stop_at - edge))
        now = time.monotonic()
        ms = [v for t, v in samples if t < now]  # no await since `now`: nothing newer yet
        samples.clear()
        taken = [v for v in ms if v <= REPLAYED_S * 1000]
        most_fds = max([n for t, n in fds if t < now], default=0)
        fds.clear()
        direct = percentiles([v for v in taken if v <= LATE_MS])["p99_ms"]
        slices.append({"from_s": round(edge - began, 1), "to_s": round(now - began, 1), **percentiles(taken),
                       "p99_direct_ms": direct,
                       "late": sum(v > LATE_MS for v in taken), "replayed": len(ms) - len(taken),
                       "rss_mb": round(rss_mb(), 1), "fds": most_fds,
                       "memory": memory_detail()})  # fmt: skip
        edge = now
    counter.cancel()
    lab.stop_all("soak over")
    await running
    store.close()
    supervisor.LiveSession = plain_live
    check = stored_against_produced(db, lab)
    start = {k: slices[0][k] for k in ("rss_mb", "fds", "to_s")} if slices else {}
    end = {k: slices[-1][k] for k in ("rss_mb", "fds", "to_s")} if slices else {}
    return {"boxes": boxes, "minutes": minutes, "start": start, "end": end, "slices": slices,
            "trend_p99_ms_per_h": trend([s["to_s"] for s in slices], [s["p99_ms"] for s in slices if s["n"]]),
            "trend_direct_ms_per_h": trend([s["to_s"] for s in slices], [s["p99_direct_ms"] for s in slices
                                                                        if s["n"]]),
            "store": check, "warnings": said,
            "db_mb": round(db.stat().st_size / 1e6, 1), "folder": str(folder)}  # fmt: skip


def trend(t_s: list[float], p99: list[float]) -> float | None:
    if len(t_s) < 3 or len(t_s) != len(p99):
        return None
    slope = np.polyfit(np.asarray(t_s) / 3600.0, np.asarray(p99), 1)[0]
    return round(float(slope), 3)


def stored_against_produced(db: Path, lab) -> dict:
    """Per session: trials and events in the file against what the session and its box said."""
    conn = sqlite3.connect(db)
    produced = lab.produced
    problems: list[str] = []
    at_close: list[str] = []
    trials = events = device_events = 0
    for run in lab.runs:
        sid = run.session_id
        stored = [t for (t,) in conn.execute("SELECT trial FROM trials WHERE session_id = ? ORDER BY trial", (sid,))]
        if stored != list(range(1, run.session.trials_done + 1)):
            problems.append(f"{run.name}: trials stored {len(stored)}, session counted {run.session.trials_done}")
        if len(stored) != produced[(sid, "TrialRecord")]:
            problems.append(
                f"{run.name}: {produced[(sid, 'TrialRecord')]} trial records produced, {len(stored)} stored"
            )
        n_events = conn.execute("SELECT count(*) FROM events WHERE session_id = ?", (sid,)).fetchone()[0]
        duplicates = lab.store.duplicate_events(sid)
        if n_events != produced[(sid, "EventLogged")] + 1 - duplicates:  # + the session-start note
            problems.append(f"{run.name}: {produced[(sid, 'EventLogged')]} events produced "
                            f"({duplicates} device duplicates), {n_events} stored")  # fmt: skip
        seqs = [s for (s,) in conn.execute(
            "SELECT device_seq FROM events WHERE session_id = ? AND device_seq IS NOT NULL ORDER BY device_seq",
            (sid,))]  # fmt: skip
        tracker = getattr(getattr(run.link, "side", None), "tracker", None)
        if seqs and seqs != list(range(seqs[0], seqs[0] + len(seqs))):
            problems.append(f"{run.name}: device events not contiguous ({len(seqs)} from {seqs[0]} to {seqs[-1]})")
        if tracker is not None and tracker.lost:
            problems.append(f"{run.name}: {tracker.lost} device events skipped (the box no longer held them)")
        if tracker is not None and seqs and seqs[-1] < tracker.newest_seen:
            # The box wrote it (its last beat or ack said so) but its line was dropped. A link
            # that is up at the close asks for the replay before closing, so that is a loss; a
            # cable pulled at that moment leaves the events on the box, counted apart.
            gap = f"{run.name}: seq {seqs[-1] + 1}-{tracker.newest_seen}"
            if getattr(run.link, "closed_connected", False):
                problems.append(f"{gap} not received although the link was up when the session closed")
            else:
                at_close.append(f"{gap} (the cable was out when the session ended)")
        if run.ended is None:
            problems.append(f"{run.name}: session did not end")
        trials += len(stored)
        events += n_events
        device_events += len(seqs)
    conn.close()
    return {"trials": trials, "events": events, "device_events": device_events, "problems": problems,
            "unreceived_at_close": at_close}  # fmt: skip


# ---------------------------------------------------------------- part 2: virtual time


def night(boxes: int, hours: float) -> dict:
    """A night per box in virtual time, as the live lab builds its sessions, into a SQLite store."""
    from hardware_stubs.agents import make_agent
    from hardware_stubs.emulated_box import EmulatedBox
    from server.engine.caps import HardCaps
    from server.engine.virtual import run_virtual
    from server.lab.assembly import build_session
    from server.store.writer import Store

    protocol = long_protocol(hours * 60)
    caps = HardCaps(10**7, hours * 60)
    folder = Path(tempfile.mkdtemp(prefix="vigil-night-"))
    store = Store.open(folder / "night.sqlite")
    marks = []
    trials = 0
    began = time.perf_counter()
    for i in range(boxes):
        session = build_session(protocol, 7700 + i, caps, log_events=True, summarise_estimates=True)
        sid = store.begin_session(f"night-{i + 1:02d}", f"NT-{i + 1:04d}", protocol.name, protocol.source,
                                  protocol.sha256, 7700 + i, "2026-12-03T20:00:00+00:00", {})  # fmt: skip
        agent = make_agent("q_learner", alpha=0.3, beta=5.0)
        box = EmulatedBox(protocol.wiring, agent, np.random.default_rng(8800 + i))
        last_flush = [0.0]

        def keep(records, sid=sid, last=last_flush):
            for record in records:
                store.write(sid, record)
                t = getattr(record, "t", None)
                if t is not None and t - last[0] >= 0.5:  # the store's batches, in virtual time
                    store.flush()
                    last[0] = t

        run_virtual(session, box, keep)
        store.flush()
        trials += session.trials_done
        marks.append({"box": i + 1, "rss_mb": round(rss_mb(), 1), "trials": session.trials_done,
                      "virtual_h": round(session.ended_at / 3600, 2) if session.ended_at else None})  # fmt: skip
    store.close()
    wall = time.perf_counter() - began
    return {"boxes": boxes, "hours": hours, "trials": trials, "wall_s": round(wall, 1), "marks": marks,
            "first_rss_mb": marks[0]["rss_mb"], "last_rss_mb": marks[-1]["rss_mb"], "folder": str(folder)}  # fmt: skip


# ---------------------------------------------------------------- report


def verdicts(result: dict) -> dict[str, bool]:
    out = {}
    live = result.get("live")
    if live:
        out["memory"] = live["end"]["rss_mb"] <= live["start"]["rss_mb"] * (1 + MEMORY_GROWTH)
        out["fds_flat"] = live["end"]["fds"] <= live["start"]["fds"]
        out["nothing_lost"] = not live["store"]["problems"]
        out["all_received_at_close"] = not live["store"]["unreceived_at_close"]
    nt = result.get("night")
    if nt:
        out["night_memory"] = nt["last_rss_mb"] <= nt["first_rss_mb"] * (1 + MEMORY_GROWTH)
    return out


def report(result: dict) -> str:
    lines = [f"machine: {where_run()}; load average before the run {result['load']:.2f}"]
    live = result.get("live")
    if live:
        s, e = live["start"], live["end"]
        lines += [
            f"{live['boxes']} emulated boxes on ptys for {live['minutes']:g} min, faults {FAULTS}",
            f"resident memory: {s['rss_mb']:.1f} MB at {s['to_s']:g} s (the first slice after the warm-up) -> "
            f"{e['rss_mb']:.1f} MB at {e['to_s']:g} s ({(e['rss_mb'] / s['rss_mb'] - 1) * 100:+.1f} %, "
            f"limit +{MEMORY_GROWTH * 100:g} %)",
            f"open file descriptors (most in a slice): {s['fds']} -> {e['fds']}",
            "closed-loop latency per slice, input (device clock) -> taken by the session; 'late' > 50 ms "
            "(a dropped line replayed), 'replayed' > 1 s (a pulled cable), the latter left out of p50/p99:",
            f"{'slice (s)':>16}{'n':>7}{'p50 ms':>9}{'p99 ms':>9}{'p99 direct':>11}{'late':>6}{'replayed':>10}"
            f"{'RSS MB':>9}{'fds':>6}",
        ]
        for sl in live["slices"]:
            if not sl["n"]:
                continue
            lines.append(f"{sl['from_s']:>7.0f}-{sl['to_s']:<8.0f}{sl['n']:>7}{sl['p50_ms']:>9.3f}{sl['p99_ms']:>9.3f}"
                         f"{sl['p99_direct_ms']:>11.3f}{sl['late']:>6}{sl['replayed']:>10}"
                         f"{sl['rss_mb']:>9.1f}{sl['fds']:>6}")  # fmt: skip
        first, last = live["slices"][0].get("memory"), live["slices"][-1].get("memory")
        if first and last:
            moved = ", ".join(f"{k} {first[k]:g} -> {last[k]:g}" for k in first if k in last)
            lines.append(f"where the resident memory is (MB; Threads, py_blocks: counts), first -> last slice: {moved}")
        lines.append(f"p99 trend: {live['trend_p99_ms_per_h']} ms per hour, direct path "
                     f"{live['trend_direct_ms_per_h']} ms per hour (least squares over the slices)")  # fmt: skip
        st = live["store"]
        verdict = "; ".join(st["problems"]) or "nothing lost or duplicated while the sessions ran"
        lines.append(f"stored: {st['trials']} trials, {st['events']} events ({st['device_events']} from the "
                     f"boxes); {verdict}")  # fmt: skip
        if st["unreceived_at_close"]:
            lines.append(f"not received when the sessions ended (still on the box): "
                         f"{'; '.join(st['unreceived_at_close'])}")  # fmt: skip
        if live["warnings"]:
            lines.append(f"warnings (first {len(live['warnings'])}): {live['warnings']}")
    nt = result.get("night")
    if nt:
        lines.append(f"night in virtual time: {nt['boxes']} boxes x {nt['hours']:g} h, {nt['trials']} trials in "
                     f"{nt['wall_s']:g} s wall; resident memory after the first box {nt['first_rss_mb']:.1f} MB, "
                     f"after the last {nt['last_rss_mb']:.1f} MB "
                     f"({(nt['last_rss_mb'] / nt['first_rss_mb'] - 1) * 100:+.1f} %)")  # fmt: skip
    lines.append("checks: " + ", ".join(f"{k} {'ok' if v else 'FAILED'}" for k, v in result["checks"].items()))
    return "\n".join(lines)


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--boxes", type=int, default=32)
    p.add_argument("--minutes", type=float, default=120.0, help="wall time of part 1 (default 120)")
    p.add_argument("--slice-minutes", type=float, default=10.0)
    p.add_argument("--warmup-s", type=float, default=None, help="before the first memory reading (default: "
                   "a tenth of the run, 20 to 120 s)")  # fmt: skip
    p.add_argument("--night-hours", type=float, default=12.0)
    p.add_argument("--night-boxes", type=int, default=8, help="boxes in the night, one after another (default 8)")
    p.add_argument("--no-night", action="store_true", help="skip part 2")
    p.add_argument("--no-live", action="store_true", help="skip part 1")
    p.add_argument("--json", action="store_true")
    p.add_argument("--keep", action="store_true", help="keep the databases (their folders are printed)")
    args = p.parse_args()
    warmup = args.warmup_s if args.warmup_s is not None else min(120.0, max(20.0, args.minutes * 6))
    result: dict = {"load": os.getloadavg()[0]}
    if not args.no_live:
        result["live"] = asyncio.run(soak(args.boxes, args.minutes, args.slice_minutes * 60, warmup))
    if not args.no_night:
        result["night"] = night(args.night_boxes, args.night_hours)
    result["checks"] = verdicts(result)
    if not args.keep:
        for part in ("live", "night"):
            if part in result:
                shutil.rmtree(result[part].pop("folder"), ignore_errors=True)
    print(json.dumps(result) if args.json else report(result))
    if args.keep:
        print("kept:", ", ".join(result[p]["folder"] for p in ("live", "night") if p in result))
    return 0 if all(result["checks"].values()) else 1


if __name__ == "__main__":
    sys.exit(main())
