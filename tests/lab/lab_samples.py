"""For the lab tests: a quick protocol and a lab of emulated boxes around it, and real
receivers on 127.0.0.1 for alarms: an SMTP server (aiosmtpd) and a webhook endpoint
(http.server), each keeping what it was sent."""

from __future__ import annotations

import json
import socket
import threading
from email import message_from_bytes
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import yaml
from aiosmtpd.controller import Controller

REPO = Path(__file__).resolve().parents[2]


def quick_protocol() -> str:
    """The example reversal protocol made quick: 0.6 s to press, every press paid, a short
    ITI, and one rule that raises an alarm once 2 of the last 3 trials went without a press."""
    doc = yaml.safe_load((REPO / "protocols" / "reversal.yaml").read_text(encoding="utf-8"))
    doc["name"] = "quick choice"
    for option in doc["options"].values():
        option["reward_probability"] = 1.0
    for step in doc["trial_types"]["two_choice"]["steps"]:
        step["wait_s"] = 0.6 if step["step"] == "offer" else 0.1
    doc["iti"] = {"uniform": [0.1, 0.2]}
    doc["rules"] = [{"rule": "idle", "when": "omission_rate(3) >= 0.6", "cooldown": 1000,
                     "then": {"alarm": "the animal stopped pressing"}}]  # fmt: skip
    doc.pop("limits", None)
    return yaml.safe_dump(doc, sort_keys=False)


def write_lab(folder: Path, name: str, boxes: list[tuple[str, str, int, dict]], caps: str, alarms: str) -> Path:
    """A lab config of emulated boxes (name, animal, seed, agent options) on the quick protocol."""
    (folder / "quick.yaml").write_text(quick_protocol(), encoding="utf-8")
    listed = "".join(
        f"  - {{name: {box}, animal: {animal}, protocol: quick.yaml,\n"
        f"     emulate: {{agent: random, seed: {seed}, traits: {json.dumps(options)}}}}}\n"
        for box, animal, seed, options in boxes
    )
    path = folder / "lab.yaml"
    path.write_text(f"lab: {name}\ncaps: {caps}\nboxes:\n{listed}{alarms}", encoding="utf-8")
    return path


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class MailRoom:
    """An SMTP server; `messages` holds each one's facts (the `key: value` lines of the body)."""

    def __init__(self) -> None:
        self.messages: list[dict[str, str]] = []
        self.port = free_port()
        self._controller = Controller(self, hostname="127.0.0.1", port=self.port)

    async def handle_DATA(self, server, session, envelope):  # aiosmtpd's handler hook
        mail = message_from_bytes(envelope.content)
        body = mail.get_payload(decode=True).decode()
        facts = dict(line.split(": ", 1) for line in body.splitlines() if ": " in line)
        facts["subject"] = mail["Subject"]
        facts["rcpt"] = ",".join(envelope.rcpt_tos)
        self.messages.append(facts)
        return "250 OK"

    def __enter__(self) -> MailRoom:
        self._controller.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._controller.stop()


class Hook:
    """A webhook endpoint: `bodies` holds every JSON body, `headers` their Authorization.

    `fail_first` answers that many requests with 503; `hold` (an Event) keeps each request
    waiting until it is set, like a receiver that hangs."""

    def __init__(self, fail_first: int = 0, hold: threading.Event | None = None) -> None:
        self.bodies: list[dict] = []
        self.auth: list[str | None] = []
        self.tries = 0
        hook = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:
                length = int(self.headers.get("Content-Length", 0))
                body = json.loads(self.rfile.read(length))
                hook.tries += 1
                if hold is not None:
                    hold.wait()
                if hook.tries <= fail_first:
                    self.send_response(503)
                    self.end_headers()
                    return
                hook.bodies.append(body)
                hook.auth.append(self.headers.get("Authorization"))
                self.send_response(204)
                self.end_headers()

            def log_message(self, *args) -> None:
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.server.daemon_threads = True
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}/hooks/night-desk"
        self._thread = threading.Thread(target=self.server.serve_forever, daemon=True)

    def __enter__(self) -> Hook:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.server.shutdown()
        self.server.server_close()
