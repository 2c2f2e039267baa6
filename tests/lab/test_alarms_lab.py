"""Alarms from a running lab to a real SMTP server and a real webhook receiver on 127.0.0.1.

Two emulated boxes (in process, virtual animals in real time): `rig-7a` works until the
reward cap ends its session; `rig-7b`'s animal never presses, so it goes silent, a rule
raises its alarm, its link is pulled three times and it is stopped by hand. The store is
made to fail for a moment and the disk threshold is set above any disk. Each kind must reach
each receiver once, the repeated link losses must not, and the all clears must follow.
"""

from __future__ import annotations

import asyncio
import threading
import time
from collections import Counter
from pathlib import Path

import pytest
from lab_samples import Hook, MailRoom, write_lab

from server.engine.records import ControlAction
from server.lab.config import load_lab
from server.lab.supervisor import RUN_TIME_LIMIT, Lab
from server.store.writer import Store

TOKEN = "night-desk-4417-token"


def rig7(tmp_path: Path, mail_port: int, hook_url: str) -> Path:
    boxes = [("rig-7a", "QC-0701", 71, {"latency_s": 0.1, "omission": 0.0}),
             ("rig-7b", "QC-0702", 72, {"omission": 1.0, "pause_s": 100000})]  # fmt: skip
    return write_lab(
        tmp_path,
        "Rig room 7",
        boxes,
        "{max_rewards: 4, max_minutes: 10}",
        f"""\
alarms:
  no_response_minutes: 0.03
  disk_free_mb: 1000000000000
  send:
    - email: {{relay: 127.0.0.1, port: {mail_port}, security: none, sender: vigil@rig7.example,
               to: [on-call@rig7.example]}}
      kinds: all
    - webhook: {{url: "{hook_url}", token_env: RIG7_HOOK_TOKEN}}
      kinds: all
""",
    )


async def until(check, timeout: float = 20.0) -> None:
    deadline = time.monotonic() + timeout
    while not check():
        if time.monotonic() > deadline:
            raise AssertionError("timed out")
        await asyncio.sleep(0.05)


def test_each_alarm_kind_reaches_mail_and_webhook_once_with_its_all_clear(tmp_path, monkeypatch):
    monkeypatch.setenv("RIG7_HOOK_TOKEN", TOKEN)
    said: list[str] = []
    store_down = threading.Event()
    with MailRoom() as mail, Hook() as hook:
        config = load_lab(rig7(tmp_path, mail.port, hook.url))
        store = Store.open(tmp_path / "rig7.sqlite")
        lab = Lab(config, store, say=said.append, in_process_boxes=True,
                  store_problem=lambda: "could not write: disk i/o error" if store_down.is_set() else None)  # fmt: skip

        async def scenario() -> None:
            task = asyncio.create_task(lab.run(minutes=1))
            await until(lambda: len(lab.runs) == 2)
            eager, lazy = lab.runs
            await until(lambda: eager.session.finished)  # the reward cap
            for _ in range(3):  # three losses within the repeat window: one message
                lazy.link.connected = False
                await asyncio.sleep(1.6)
                lazy.link.connected = True
                await asyncio.sleep(1.6)
            store_down.set()
            await asyncio.sleep(1.6)
            store_down.clear()
            await until(lambda: lazy.status.last_alarm is not None)
            await asyncio.sleep(1.2)
            lab.control("rig-7b", ControlAction.STOP, "test")
            await asyncio.wait_for(task, 20)

        asyncio.run(scenario())
        store.close()
        expected_raised = {("rig-7a", "cap_reached"), ("rig-7b", "link_lost"), ("rig-7b", "no_response"),
                           ("rig-7b", "rule_alarm"), ("rig-7b", "ended_early"), (None, "store_unreachable"),
                           (None, "disk_nearly_full")}  # fmt: skip
        expected_cleared = {("rig-7b", "link_lost"), ("rig-7b", "no_response"), (None, "store_unreachable")}
        for name, got in (("webhook", hook.bodies), ("e-mail", mail.messages)):
            # the e-mail body carries the same facts as `key: value` lines
            norm = [{**b, "box": b.get("box") or None} for b in got]
            raised = Counter((b["box"], b["kind"]) for b in norm if b["state"] == "raised")
            # rig-7a's virtual animal may miss 2 of 3 quick trials too before its cap: once at most
            if raised[("rig-7a", "rule_alarm")] == 1:
                del raised[("rig-7a", "rule_alarm")]
            cleared = Counter((b["box"], b["kind"]) for b in norm if b["state"] == "cleared")
            assert set(raised) == expected_raised and set(raised.values()) == {1}, (name, raised)
            assert set(cleared) == expected_cleared and set(cleared.values()) == {1}, (name, cleared)
            assert not [b for b in norm if b["state"] == "still"], name
        assert set(hook.auth) == {f"Bearer {TOKEN}"}
        assert {m["rcpt"] for m in mail.messages} == {"on-call@rig7.example"}
        link = next(b for b in hook.bodies if b["kind"] == "link_lost" and b["state"] == "raised")
        assert link["animal"] == "QC-0702" and link["lab"] == "Rig room 7" and link["text"].startswith("[Rig room 7]")
        rule = next(b for b in hook.bodies if b["kind"] == "rule_alarm" and b["box"] == "rig-7b")
        assert "the animal stopped pressing" in rule["text"]
        assert not [s for s in said if s.startswith("warning")], said


def test_a_hung_receiver_and_a_dead_relay_do_not_hold_the_sessions(tmp_path, monkeypatch):
    """The receiver takes every request and never answers until the test lets it; the SMTP
    port has nobody listening. The sessions still run to their end, and the lab ends, while
    the first request is still held: sends are not on the boxes' path."""
    monkeypatch.setenv("RIG7_HOOK_TOKEN", TOKEN)
    from lab_samples import free_port

    release = threading.Event()
    said: list[str] = []
    with Hook(hold=release) as hook:
        config = load_lab(rig7(tmp_path, free_port(), hook.url))
        store = Store.open(tmp_path / "rig7.sqlite")
        lab = Lab(config, store, say=said.append, in_process_boxes=True)

        async def scenario() -> None:
            task = asyncio.create_task(lab.run(minutes=0.05))  # 3 s
            await until(lambda: hook.tries >= 1)  # the disk alarm went out and hangs there
            await asyncio.wait_for(task, 30)

        asyncio.run(scenario())
        eager, lazy = lab.runs
        assert eager.ended.reason == "reward cap reached" and lazy.ended.reason == RUN_TIME_LIMIT
        assert hook.bodies == []  # nothing was answered while the sessions ran
        assert any("not sent before the lab ended" in s for s in said), said
        assert any("alarm to e-mail via 127.0.0.1" in s and "failed" in s for s in said), said
        release.set()
        store.close()


@pytest.mark.parametrize("fail_first", [2])
def test_a_failed_send_is_retried_with_backoff_and_logged(fail_first):
    from server.lab.alarm_send import ChannelThread, Outgoing, webhook_sender
    from server.lab.alarm_watch import AlarmNote
    from server.lab.config_alarms import ALARM_KINDS, AlarmChannel, WebhookTo

    said: list[str] = []
    with Hook(fail_first=fail_first) as hook:
        channel = AlarmChannel(WebhookTo(hook.url), frozenset(ALARM_KINDS))
        thread = ChannelThread(channel, webhook_sender(hook.url, None, "text"), size=10, say=said.append,
                               first_retry_s=0.05)  # fmt: skip
        thread.start()
        thread.post(
            Outgoing(AlarmNote("link_lost", "rig-9", "raised", "link lost", 0.0), "Rig 9", "2026-12-03T02:00:00+00:00")
        )
        deadline = time.monotonic() + 10
        while not hook.bodies and time.monotonic() < deadline:
            time.sleep(0.02)
        thread.begin_close()
        thread.join(2)
    assert len(hook.bodies) == 1 and hook.tries == fail_first + 1
    retries = [s for s in said if "failed (receiver answered 503" in s]
    assert [r.split("; ")[1].split(":")[0] for r in retries] == ["retry in 0.05 s", "retry in 0.1 s"]
    assert thread.sent == 1 and thread.given_up == 0
