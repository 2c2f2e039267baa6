"""`vigil run` on a lab whose boxes are simulated reference boards (`port:` at each board's
pty), one per example protocol that fits the reference box. A pin script presses levers and
breaks the magazine beam; one board's cable is pulled and put back mid-session, another
board is reset mid-session. The database must hold every input edge the pins made exactly
once, with the board's own time, and the trials and pellets must agree with the pins."""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
import threading
import time

import yaml

from hardware_stubs.simulated_board import FREQ_HZ, HERE
from server.lab.supervisor import RUN_TIME_LIMIT
from server.protocol.load import load_protocol

ROOT = HERE.parent
US = FREQ_HZ // 1_000_000
RUN_MINUTES = 0.4
ROOM_LIGHT = 5  # every fitting protocol turns the house light on at the start

# Per board: (protocol, press pattern (channel, every_s, hold_s, first_s), fault, fault_at_s)
BOXES = {
    "sim-reversal": ("reversal", [(1, 1.7, 0.12, 0.5), (2, 1.7, 0.12, 1.35), (3, 1.1, 0.3, 0.8)],
                     "unplug", 6.0),
    "sim-autoshaping": ("autoshaping", [(1, 0.9, 0.1, 0.4), (3, 1.3, 0.4, 0.7)], None, 0),
    "sim-lever": ("lever_training_devaluation", [(1, 0.7, 0.1, 0.3), (3, 1.9, 0.5, 0.6)],
                  "reset", 9.0),
}  # fmt: skip
SCRIPT_S = 16.0
QUIET_S = 1.0  # no edge this close to a reset: edges not yet sent when it comes are gone


def pin_script(pattern, fault: str | None, fault_at: float) -> list[tuple[float, int, bool]]:
    steps = []
    for channel, every, hold, first in pattern:
        t = first
        while t + hold < SCRIPT_S:
            if not (fault == "reset" and fault_at - QUIET_S < t < fault_at + QUIET_S):
                steps += [(t * 1e6, channel, True), ((t + hold) * 1e6, channel, False)]
            t += every
    return steps


def test_vigil_run_on_simulated_boards_stores_every_pin_edge_once(start_board, tmp_path):
    boards, config = {}, {"lab": "simulated rack", "database": str(tmp_path / "lab.sqlite"),
                          "caps": {"max_rewards": 250, "max_minutes": 90}, "boxes": []}  # fmt: skip
    for i, (name, (protocol, *_)) in enumerate(BOXES.items()):
        board = boards[name] = start_board(name)
        config["boxes"].append({"name": name, "animal": f"SIM-{i + 1}", "seed": 11 + i,
                                "protocol": str(ROOT / "protocols" / f"{protocol}.yaml"),
                                "port": str(board.link)})  # fmt: skip
    lab = tmp_path / "lab.yaml"
    lab.write_text(yaml.safe_dump(config))
    run = subprocess.Popen(
        [sys.executable, "-m", "server.cli", "run", str(lab), "--minutes", str(RUN_MINUTES),
         "--port", "0"],
        cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )  # fmt: skip
    started: dict[str, int] = {}

    def drive(name: str) -> None:
        board = boards[name]
        _, pattern, fault, fault_at = BOXES[name]
        # The session has started once the house light is on; the script starts then.
        if not board.wait_for(lambda b: any(c.channel == ROOM_LIGHT and c.level for c in b.outputs), 30):
            return
        started[name] = board.script(pin_script(pattern, fault, fault_at))
        time.sleep(fault_at)
        if fault == "unplug":
            board.unplug()
            time.sleep(2.5)
            board.plug()
        elif fault == "reset":
            board.reset()

    threads = [threading.Thread(target=drive, args=(n,), daemon=True) for n in boards]
    for t in threads:
        t.start()
    out, err = run.communicate(timeout=120)
    for t in threads:
        t.join(timeout=5)
    assert run.returncode == 0, out + err
    assert "Traceback" not in err
    assert set(started) == set(BOXES), out + err

    conn = sqlite3.connect(tmp_path / "lab.sqlite")
    for name, board in boards.items():
        protocol, _, fault, _ = BOXES[name]
        wiring = load_protocol(ROOT / "protocols" / f"{protocol}.yaml").wiring
        input_name = {line.channel: line.name for line in wiring.inputs.values()}
        (session,) = conn.execute("SELECT id FROM sessions WHERE box = ?", (name,)).fetchone()
        stored = conn.execute(
            "SELECT name, value, device_t_us, device_seq, detail FROM events"
            " WHERE session_id = ? AND kind = 'input' ORDER BY device_seq", (session,)).fetchall()  # fmt: skip
        # The pins: every change the script made once the session was on (all are held far
        # longer than the 2 ms debounce, so each is an edge), up to the session's end.
        edges = [c for c in board.inputs if c.cycle >= started[name] and c.channel in input_name]
        stored_edges = [(n, bool(v)) for n, v, *_ in stored]
        pin_edges = [(input_name[c.channel], bool(c.level)) for c in edges[: len(stored)]]
        assert stored_edges == pin_edges, name
        # Nothing lost: the pins made at most the edges that fell after the session ended.
        ended = conn.execute("SELECT end_reason FROM sessions WHERE id = ?", (session,)).fetchone()[0]
        assert ended == RUN_TIME_LIMIT, name
        assert len(edges) - len(stored) <= 2, (name, len(edges), len(stored))
        # Nothing doubled, numbers without a gap (PROTOCOL.md section 6).
        seqs = [s for *_, s, _ in stored]
        assert seqs == list(range(seqs[0], seqs[0] + len(seqs))), name
        # The board's time of each edge is the pin's time plus one offset per boot (the
        # board's clock starts at its setup), within the pin-change interrupt's latency.
        resets = board.resets
        for segment in range(len(resets) + 1):
            lo = resets[segment - 1] if segment else 0
            hi = resets[segment] if segment < len(resets) else 2**63
            offsets = [d - c.cycle // US for (_, _, d, _, _), c in zip(stored, edges)
                       if lo <= c.cycle < hi]  # fmt: skip
            if offsets:
                assert max(offsets) - min(offsets) <= 25, (name, segment, offsets[:5])
        # Pellets: each feeder pulse on the pin is a stored pellet pulse, 30 ms wide.
        pulses = board.pulses_us(7)
        sent = conn.execute(
            "SELECT count(*) FROM events WHERE session_id = ? AND kind = 'pulse'"
            " AND name = 'pellet' AND value IS NOT NULL",
            (session,),
        ).fetchone()[0]
        sent -= conn.execute("SELECT count(*) FROM events WHERE session_id = ? AND kind = 'note'"
                             " AND name = 'pellet' AND detail LIKE '%not_delivered%'",
                             (session,)).fetchone()[0]  # fmt: skip
        rewarded = conn.execute("SELECT count(*) FROM trials WHERE session_id = ? AND rewarded = 1",
                                (session,)).fetchone()[0]  # fmt: skip
        print(f"\n{name}: {len(stored)} edges stored of {len(edges)} made, {rewarded} rewarded "
              f"trials, {sent} pellet pulses sent, {len(pulses)} on the pin")  # fmt: skip
        assert len(pulses) == sent >= rewarded > 0 if protocol != "autoshaping" else len(pulses) == sent
        assert all(abs(w - 30_000) <= 100 for _, w in pulses), name
        kinds = [k for (k,) in conn.execute(
            "SELECT kind FROM events WHERE session_id = ? AND kind IN ('link_lost', 'link_restored')"
            " ORDER BY t", (session,))]  # fmt: skip
        alarms = [json.loads(d) for (d,) in conn.execute(
            "SELECT detail FROM events WHERE session_id = ? AND kind = 'alarm'", (session,))]  # fmt: skip
        if fault == "unplug":
            assert kinds == ["link_lost", "link_restored"], name
            during = [d for *_, d in stored if d and "during_link_loss" in d]
            assert during, "edges made while the cable was out come back by replay"
        elif fault == "reset":
            assert any(a.get("device_restarted") for a in alarms), (name, alarms)
            # The reset put every output off; the host drives back what the session expects.
            after = [c for c in board.output_log(ROOM_LIGHT) if c.cycle >= resets[0]]
            assert [c.level for c in after][:2] == [0, 1], (name, after)
            assert (after[1].cycle - resets[0]) / FREQ_HZ < 2.0
        else:
            assert kinds == [] and not alarms, name
