"""Status page under load, beside a running lab of 32 emulated boxes.

The lab runs as `vigil demo` does (32 boxes with virtual animals, in real time) in this
process, with the status page in its own process (`server.web.child`, started by
`start_page` as `vigil demo` does), fed the tiles over the channel. Load: 20 clients in a
third process, each asking for /api/boxes and then the overview page over keep-alive HTTP.

Figures:
1. Response time p50/p99 of /api/boxes and / with 20 clients polling once a second each
   (a browser's pace) and flat out (no pause at all: the page's capacity). Target p99 <= 50 ms.
   Baseline in the same run: a static asset (/assets/vigil.svg) fetched by one client, the
   HTTP floor of this server on this machine.
2. Closed-loop latency of the boxes: from the moment an emulated box's input is due to the
   moment the session core takes it (timer lateness + link + driver), every input of every
   box, p50/p99, with no page load (baseline, in slices alternating with the polling load so
   the machine's other work falls on both alike), under polling and flat out. Target:
   p99 under polling within 0.5 ms of the unloaded figure. Measured with the in-process
   link (no pty, no serial); bench/latency.py measures the serial path. The 32 boxes give
   about 11 inputs a second, so the default 180 s per condition collects some 2,000 samples
   each (the 99th percentile then rests on ~20 samples above it, not ~4).
3. The feed's cost on the lab's loop: the time to read every run's facts and encode the
   line (or find nothing changed), per turn (4 a second), and the bytes sent.

    python bench/web.py [--boxes 32] [--clients 20] [--seconds 180] [--rounds 12] [--json]
"""

from __future__ import annotations

import argparse
import asyncio
import http.client
import json
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from urllib.parse import urlsplit

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from machine import where_run  # noqa: E402  (bench/ is on sys.path when run as a script)


def pct(values: list[float], q: float) -> float:
    if not values:
        return float("nan")
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(round(q / 100 * (len(ordered) - 1))))]


# ---------------------------------------------------------------- load clients (child process)


def client_main(url: str, clients: int, windows: list, paths: list[str]) -> None:
    """Run `clients` threads that fetch `paths` in turn during each window
    [name, start, end, interval] (monotonic seconds, shared with the parent on Linux;
    interval 0 = back to back); print {name: {path: [ms, ...]}, "errors": n} as JSON."""
    parts = urlsplit(url)
    times: dict = {name: {p: [] for p in paths} for name, *_ in windows}
    lock = threading.Lock()
    errors = [0]

    def one_client(k: int) -> None:
        conn = http.client.HTTPConnection(parts.hostname, parts.port, timeout=10)
        for name, start, end, interval in windows:
            next_at = start + interval * k / max(1, clients)  # spread the clients out
            while True:
                now = time.monotonic()
                if interval:
                    if next_at > now:
                        time.sleep(next_at - now)
                    next_at += interval
                elif now < start:
                    time.sleep(start - now)
                if time.monotonic() >= end:
                    break
                for path in paths:
                    for _ in (1, 2):  # a keep-alive connection the server closed while
                        began = time.perf_counter()  # idle is retried once, as browsers do
                        try:
                            conn.request("GET", path)
                            response = conn.getresponse()
                            response.read()
                            ok = response.status == 200
                            break
                        except (OSError, http.client.HTTPException):
                            ok = False
                            conn.close()
                            conn = http.client.HTTPConnection(parts.hostname, parts.port, timeout=10)
                    took = (time.perf_counter() - began) * 1000
                    with lock:
                        if ok:
                            times[name][path].append(took)
                        else:
                            errors[0] += 1
        conn.close()

    threads = [threading.Thread(target=one_client, args=(k,)) for k in range(clients)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    sys.stdout.write(json.dumps({"times": times, "errors": errors[0]}) + "\n")


async def load(url: str, clients: int, windows: list, paths: list[str]) -> dict:
    proc = await asyncio.create_subprocess_exec(
        sys.executable,
        __file__,
        "--client",
        url,
        "--clients",
        str(clients),
        "--windows",
        json.dumps(windows),
        "--paths",
        ",".join(paths),
        stdout=subprocess.PIPE,
    )
    out, _ = await proc.communicate()
    return json.loads(out)


# ---------------------------------------------------------------- the lab side


class Latencies:
    """(when, due-to-taken ms) of every box input while recording."""

    def __init__(self) -> None:
        self.samples: list[tuple[float, float]] = []
        self.on = False

    def queue_for(self, clock):
        record = self

        class TimedQueue(asyncio.Queue):
            def _get(self):
                item = super()._get()
                if record.on and isinstance(item, tuple):
                    record.samples.append((time.monotonic(), (clock() - item[1]) * 1000))
                return item

        return TimedQueue()

    def within(self, windows: list, name: str) -> list[float]:
        spans = [(a, b) for n, a, b, _ in windows if n == name]
        return [ms for when, ms in self.samples if any(a <= when < b for a, b in spans)]


def timed_feed(latencies: Latencies, costs: list):
    """FeedBuilder.line, timed: (µs, bytes sent or 0) per turn while recording."""
    from server.lab.page_feed import FeedBuilder

    plain = FeedBuilder.line

    def line(self):
        began = time.perf_counter()
        out = plain(self)
        if latencies.on:
            costs.append(((time.perf_counter() - began) * 1e6, len(out) if out else 0))
        return out

    FeedBuilder.line = line
    return plain


async def bench(boxes: int, clients: int, seconds: float, rounds: int) -> dict:
    import server.lab.supervisor as supervisor
    from server.cli import DEMO_CONFIG
    from server.lab.demo import demo_lab
    from server.lab.page_feed import FeedBuilder
    from server.lab.page_process import start_page
    from server.lab.supervisor import Lab
    from server.store.writer import Store

    latencies = Latencies()
    feed_costs: list = []
    plain_live = supervisor.LiveSession
    plain_feed = timed_feed(latencies, feed_costs)

    class TimedLiveSession(plain_live):  # the driver's inbox, timed from due to taken
        def __init__(self, session, link, clock, publish):
            super().__init__(session, link, clock, publish)
            self.inbox = latencies.queue_for(clock)

    supervisor.LiveSession = TimedLiveSession
    folder = Path(tempfile.mkdtemp(prefix="vigil-bench-web-"))
    db = folder / "bench.sqlite"
    store = Store.open(db)
    lab = Lab(demo_lab(DEMO_CONFIG, boxes), store, say=lambda text: None, in_process_boxes=True)
    page = await start_page(
        lab,
        db,
        host="127.0.0.1",
        port=0,
        operator_token="bench-operator-token-0000",
        viewer_token=None,
        lab_name=lab.config.lab,
        quiet_after_s=300.0,
        say=print,
    )
    running = asyncio.create_task(lab.run())
    while len(lab.runs) < boxes:
        await asyncio.sleep(0.05)
    await asyncio.wait_for(page.end.ready.wait(), 60)
    await asyncio.sleep(2.0)  # every box past its first trial start
    url = page.url
    result: dict = {"boxes": boxes, "clients": clients, "seconds": seconds, "rounds": rounds, "page_pid": page.pid}
    result["http_single"] = (
        await load(
            url,
            1,
            [["single", time.monotonic() + 0.5, time.monotonic() + 3.5, 0.0]],
            ["/assets/vigil.svg", "/api/boxes", "/"],
        )
    )["times"]["single"]
    # Unloaded and polling windows alternate, so drift in the machine's other load falls on
    # both alike; one flat-out window at the end.
    slice_s = seconds / rounds
    t = time.monotonic() + 1.5  # the client process needs a moment to start
    windows = []
    for _ in range(rounds):
        windows.append(["unloaded", t, t + slice_s, 0.0])
        windows.append(["polling", t + slice_s, t + 2 * slice_s, 1.0])
        t += 2 * slice_s
    windows.append(["flat_out", t, t + slice_s, 0.0])
    latencies.on = True
    loaded = await load(url, clients, [w for w in windows if w[0] != "unloaded"], ["/api/boxes", "/"])
    latencies.on = False
    result["http_polling"] = loaded["times"]["polling"]
    result["http_flat_out"] = loaded["times"]["flat_out"]
    result["errors"] = loaded["errors"]
    for name in ("unloaded", "polling", "flat_out"):
        result[f"loop_{name}"] = latencies.within(windows, name)
    result["feed"] = feed_costs
    lab.stop_all("bench over")
    await running
    result["page_exit"] = await page.close()
    store.close()
    supervisor.LiveSession = plain_live
    FeedBuilder.line = plain_feed
    return result


def summary(result: dict) -> dict:
    out: dict = {
        "machine": where_run(),
        "boxes": result["boxes"],
        "clients": result["clients"],
        "seconds_per_condition": result["seconds"],
        "rounds": result["rounds"],
        "http": {},
        "closed_loop_ms": {},
        "errors": result["errors"],
        "page_exit": result["page_exit"],
    }
    costs = [us for us, _ in result["feed"]]
    sent = [size for _, size in result["feed"] if size]
    out["feed"] = {
        "turns": len(costs),
        "sent": len(sent),
        "p50_us": pct(costs, 50),
        "p99_us": pct(costs, 99),
        "max_us": max(costs, default=float("nan")),
        "mean_bytes": sum(sent) / len(sent) if sent else 0.0,
    }
    for path, values in result["http_single"].items():
        out["http"][f"1 client {path}"] = {"n": len(values), "p50_ms": pct(values, 50), "p99_ms": pct(values, 99)}
    for name in ("polling", "flat_out"):
        for path, values in result[f"http_{name}"].items():
            out["http"][f"{result['clients']} clients {name} {path}"] = {
                "n": len(values),
                "p50_ms": pct(values, 50),
                "p99_ms": pct(values, 99),
            }
    for name in ("unloaded", "polling", "flat_out"):
        values = result[f"loop_{name}"]
        out["closed_loop_ms"][name] = {
            "n": len(values),
            "p50": pct(values, 50),
            "p99": pct(values, 99),
            "max": max(values, default=float("nan")),
        }
    return out


def report(s: dict) -> str:
    lines = [
        f"machine: {s['machine']}",
        f"lab: {s['boxes']} emulated boxes (in-process link), status page in its own "
        f"process; {s['seconds_per_condition']:g} s per condition in {s['rounds']} "
        f"alternating slices; request errors: {s['errors']}; page process exit code "
        f"{s['page_exit']}",
        "",
        "response time (ms)",
    ]
    lines.append(f"  {'':44} {'n':>6} {'p50':>8} {'p99':>8}")
    for name, row in s["http"].items():
        lines.append(f"  {name:44} {row['n']:6d} {row['p50_ms']:8.2f} {row['p99_ms']:8.2f}")
    floor = s["http"].get("1 client /assets/vigil.svg", {}).get("p50_ms")
    if floor:
        boxes_p50 = s["http"]["1 client /api/boxes"]["p50_ms"]
        lines.append(f"  /api/boxes p50 = {boxes_p50 / floor:.2f} x the static-file floor")
    lines += [
        "",
        "closed-loop latency, input due -> taken by the session (ms)",
        f"  {'':16} {'n':>6} {'p50':>7} {'p99':>7} {'max':>7}",
    ]
    base = s["closed_loop_ms"]["unloaded"]["p99"]
    for name, row in s["closed_loop_ms"].items():
        delta = "" if name == "unloaded" else f"   p99 {row['p99'] - base:+.2f} vs unloaded"
        lines.append(f"  {name:16} {row['n']:6d} {row['p50']:7.3f} {row['p99']:7.3f} {row['max']:7.2f}{delta}")
    feed = s["feed"]
    lines += [
        "",
        f"feed on the lab's loop: {feed['turns']} turns, {feed['sent']} lines sent "
        f"(mean {feed['mean_bytes']:.0f} bytes); per turn p50 {feed['p50_us']:.0f} us, "
        f"p99 {feed['p99_us']:.0f} us, max {feed['max_us']:.0f} us",
    ]
    poll_p99 = max(v["p99_ms"] for k, v in s["http"].items() if "polling" in k)
    loop_delta = s["closed_loop_ms"]["polling"]["p99"] - base
    lines += [
        "",
        f"targets: page p99 under polling {poll_p99:.1f} ms (<= 50: "
        f"{'met' if poll_p99 <= 50 else 'NOT met'}); closed-loop p99 under polling "
        f"{loop_delta:+.2f} ms vs unloaded (<= +0.5: {'met' if loop_delta <= 0.5 else 'NOT met'})",
    ]
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--boxes", type=int, default=32)
    parser.add_argument("--clients", type=int, default=20)
    parser.add_argument(
        "--seconds", type=float, default=180.0, help="seconds of each condition (unloaded, polling), in slices"
    )
    parser.add_argument("--rounds", type=int, default=12, help="alternating slices per condition")
    parser.add_argument("--json", action="store_true")
    parser.add_argument("--client", metavar="URL", help=argparse.SUPPRESS)
    parser.add_argument("--windows", default="[]", help=argparse.SUPPRESS)
    parser.add_argument("--paths", default="/api/boxes,/", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.client:
        client_main(args.client, args.clients, json.loads(args.windows), args.paths.split(","))
        return
    s = summary(asyncio.run(bench(args.boxes, args.clients, args.seconds, args.rounds)))
    print(json.dumps(s, sort_keys=True) if args.json else report(s))


if __name__ == "__main__":
    main()
