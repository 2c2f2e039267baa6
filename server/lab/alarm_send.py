"""Alarm messages out to people: e-mail through the lab's SMTP relay and HTTP webhooks.

Nothing here runs on the boxes' event loop. Each channel has its own thread and a bounded
queue: `post` appends under a lock and returns (a full queue drops its oldest message and
says so), so a relay that hangs for its whole timeout or a receiver that is down delays only
its own channel. A failed send is logged and retried with doubling waits; during a channel's
quiet hours its messages are held and the ones still true are sent when the hours end.
"""

from __future__ import annotations

import json
import smtplib
import ssl
import threading
import urllib.error
import urllib.request
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime
from email.message import EmailMessage
from typing import Any

from server.lab.alarm_watch import AlarmNote
from server.lab.config_alarms import AlarmChannel, EmailTo, channel_secrets

SEND_TIMEOUT_S = 10.0
FIRST_RETRY_S = 2.0
LONGEST_RETRY_S = 300.0
ATTEMPTS = 8  # about 8 minutes of trying before a message is given up


@dataclass(frozen=True, slots=True)
class Outgoing:
    """A note with where and when it happened, as the channels send it."""

    note: AlarmNote
    lab: str
    at: str  # wall time, ISO 8601 with zone
    about: dict[str, Any] = field(default_factory=dict)  # animal, session (box alarms)

    def payload(self) -> dict[str, Any]:
        n = self.note
        return {"lab": self.lab, "box": n.box or None, "kind": n.kind, "state": n.state, "at": self.at,
                "text": n.line(), "repeats": n.repeats, **self.about}  # fmt: skip


class SendFailed(Exception):
    """A send that did not go through, with a one-line reason."""


def email_sender(to: EmailTo, password: str | None) -> Callable[[Outgoing], None]:
    def send(out: Outgoing) -> None:
        msg = EmailMessage()
        msg["Subject"] = f"[{out.lab}] {out.note.line()}"[:200]
        msg["From"] = to.sender
        msg["To"] = ", ".join(to.to)
        facts = "\n".join(f"{k}: {v}" for k, v in out.payload().items() if v is not None and k != "text")
        msg.set_content(f"{out.note.line()}\n\n{facts}\n\n-- sent by vigil run")
        try:
            if to.security == "tls":
                client: smtplib.SMTP = smtplib.SMTP_SSL(to.relay, to.port, timeout=SEND_TIMEOUT_S,
                                                        context=ssl.create_default_context())  # fmt: skip
            else:
                client = smtplib.SMTP(to.relay, to.port, timeout=SEND_TIMEOUT_S)
            with client:
                if to.security == "starttls":
                    client.starttls(context=ssl.create_default_context())
                if to.user is not None and password is not None:
                    client.login(to.user, password)
                client.send_message(msg)
        except (OSError, smtplib.SMTPException) as exc:
            raise SendFailed(f"{type(exc).__name__}: {exc}".strip()) from None

    return send


def webhook_sender(url: str, token: str | None, text_key: str) -> Callable[[Outgoing], None]:
    def send(out: Outgoing) -> None:
        body = out.payload()
        body[text_key] = f"[{out.lab}] {out.note.line()}"
        headers = {"Content-Type": "application/json", "User-Agent": "vigil-alarms"}
        if token is not None:
            headers["Authorization"] = f"Bearer {token}"
        request = urllib.request.Request(url, json.dumps(body).encode(), headers, method="POST")
        try:
            with urllib.request.urlopen(request, timeout=SEND_TIMEOUT_S) as answer:
                answer.read()
        except urllib.error.HTTPError as exc:
            raise SendFailed(f"receiver answered {exc.code} {exc.reason}") from None
        except (OSError, ValueError) as exc:  # URLError is an OSError
            raise SendFailed(f"{type(exc).__name__}: {getattr(exc, 'reason', exc)}") from None

    return send


def make_sender(channel: AlarmChannel, environ: dict[str, str] | None = None) -> Callable[[Outgoing], None]:
    """The channel's send function, its secrets read from the environment now.

    Raises KeyError naming an environment variable the channel needs that is not set."""
    secrets = channel_secrets(channel, environ)
    if isinstance(channel.to, EmailTo):
        return email_sender(channel.to, secrets.get("password"))
    url = channel.to.url or secrets["url"]
    return webhook_sender(url, secrets.get("token"), channel.to.text_key)


def local_minute() -> int:
    now = datetime.now().astimezone()
    return now.hour * 60 + now.minute


class ChannelThread:
    """One channel's queue and the thread that empties it."""

    def __init__(
        self,
        channel: AlarmChannel,
        send: Callable[[Outgoing], None],
        *,
        size: int,
        say: Callable[[str], None],
        minute: Callable[[], int] = local_minute,
        first_retry_s: float = FIRST_RETRY_S,
        attempts: int = ATTEMPTS,
    ):
        self.channel = channel
        self.label = channel.label
        self._send = send
        self._say = say
        self._minute = minute
        self._first_retry_s = first_retry_s
        self._attempts = attempts
        self._queue: deque[Outgoing] = deque()
        self._size = size
        self._held: dict[tuple[str, str], Outgoing] = {}  # quiet hours: the last word per box and kind
        self._wake = threading.Condition()
        self._closing = False
        self.sent = 0
        self.dropped = 0
        self.given_up = 0
        self._thread = threading.Thread(target=self._run, name=f"vigil-alarm {self.label}", daemon=True)

    def start(self) -> None:
        self._thread.start()

    def post(self, out: Outgoing) -> None:
        """Queue a message; never waits on the network."""
        if out.note.kind not in self.channel.kinds:
            return
        with self._wake:
            if len(self._queue) >= self._size:
                lost = self._queue.popleft()
                self.dropped += 1
                self._say(f"warning: alarms to {self.label}: queue full ({self._size}); dropped the oldest "
                          f"message ({lost.note.line()})")  # fmt: skip
            self._queue.append(out)
            self._wake.notify()

    def begin_close(self) -> None:
        """Send what is queued, one try each, then stop (see `join`)."""
        with self._wake:
            self._closing = True
            self._queue.extend(self._held.values())  # quiet hours do not outlast the run
            self._held.clear()
            self._wake.notify_all()

    def join(self, timeout: float) -> None:
        if self._thread.is_alive():
            self._thread.join(timeout)
        left = len(self._queue)
        if left:
            self._say(f"warning: alarms to {self.label}: {left} message(s) not sent before the lab ended")

    # ------------------------------------------------------------ the thread

    def _quiet(self) -> bool:
        quiet = self.channel.quiet
        return quiet is not None and not self._closing and quiet.holds(self._minute())

    def _run(self) -> None:
        while True:
            with self._wake:
                while not self._queue and not self._closing and not (self._held and not self._quiet()):
                    self._wake.wait(timeout=30.0 if self._held else None)
                if self._closing and not self._queue:
                    return
                if not self._queue:  # quiet hours are over: what is still held goes out
                    self._queue.extend(self._held.values())
                    self._held.clear()
                out = self._queue.popleft()
            if self._quiet():
                self._hold(out)
                continue
            self._deliver(out)

    def _hold(self, out: Outgoing) -> None:
        key = (out.note.box, out.note.kind)
        with self._wake:
            earlier = self._held.pop(key, None)
            if out.note.state == "cleared" and earlier is not None and earlier.note.state == "raised":
                return  # raised and over within the quiet hours: nothing left to tell
            self._held[key] = out

    def _deliver(self, out: Outgoing) -> None:
        wait = self._first_retry_s
        for attempt in range(1, self._attempts + 1):
            try:
                self._send(out)
            except SendFailed as exc:
                last = attempt == self._attempts or self._closing
                then = "giving up on it" if last else f"retry in {wait:g} s"
                self._say(f"warning: alarm to {self.label} failed ({exc}); {then}: {out.note.line()}")
                if last:
                    self.given_up += 1
                    return
                with self._wake:
                    self._wake.wait_for(lambda: self._closing, timeout=wait)
                wait = min(wait * 2, LONGEST_RETRY_S)
                continue
            except Exception as exc:  # a bug in one channel must not end its thread
                self._say(f"warning: alarm to {self.label}: {type(exc).__name__}: {exc}")
                self.given_up += 1
                return
            self.sent += 1
            return
