"""The lab config's `alarms` section: where alarms go, which kinds each place wants, and when.

Secrets (the relay's password, a webhook's token or its secret URL) are never read from the
file: the file names an environment variable (`password_env`, `token_env`, `url_env`) and the
lab reads it when the run starts. A plain-text secret in the file is an error at its
file:line:col, so `vigil check` catches it before the file is shared or committed.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass
from urllib.parse import urlsplit

from server.protocol.marked import Marked
from server.protocol.reader import Reader, did_you_mean

# What can be raised, with the few words a message starts with.
ALARM_KINDS = {
    "link_lost": "link lost",
    "no_response": "no response",
    "cap_reached": "reward cap reached",
    "ended_early": "session ended early",
    "rule_alarm": "rule alarm",
    "store_unreachable": "store unreachable",
    "disk_nearly_full": "disk nearly full",
}
ALARMS_KEYS = ("no_response_minutes", "repeat_minutes", "disk_free_mb", "queue", "send")
CHANNEL_KEYS = ("email", "webhook", "kinds", "quiet_hours")
EMAIL_KEYS = ("relay", "port", "security", "user", "password_env", "sender", "to")
WEBHOOK_KEYS = ("url", "url_env", "token_env", "text_key")
SECURITY = ("starttls", "tls", "none")
# Keys that would hold a secret in plain text, and the key to use instead.
SECRET_KEYS = {"password": "password_env", "token": "token_env", "secret": "token_env", "api_key": "token_env"}
_ENV_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*$")
_HOURS = re.compile(r"^([01]?\d|2[0-3]):([0-5]\d)\s*-\s*([01]?\d|2[0-3]):([0-5]\d)$")


@dataclass(frozen=True)
class QuietHours:
    """Minutes of the local day (start inclusive, end exclusive) when a channel holds its alarms;
    start > end spans midnight (22:00-07:00)."""

    start_min: int
    end_min: int

    def holds(self, minute_of_day: int) -> bool:
        if self.start_min <= self.end_min:
            return self.start_min <= minute_of_day < self.end_min
        return minute_of_day >= self.start_min or minute_of_day < self.end_min


@dataclass(frozen=True)
class EmailTo:
    relay: str
    port: int
    security: str  # starttls, tls (SMTP over TLS from the first byte) or none
    sender: str
    to: tuple[str, ...]
    user: str | None = None
    password_env: str | None = None


@dataclass(frozen=True)
class WebhookTo:
    url: str | None  # None: read from `url_env` at the start of the run
    url_env: str | None = None
    token_env: str | None = None  # sent as "Authorization: Bearer <token>"
    text_key: str = "text"  # the JSON key chat systems read the message from


@dataclass(frozen=True)
class AlarmChannel:
    to: EmailTo | WebhookTo
    kinds: frozenset[str]
    quiet: QuietHours | None = None  # off by default

    @property
    def label(self) -> str:
        if isinstance(self.to, EmailTo):
            return f"e-mail via {self.to.relay}:{self.to.port}"
        if self.to.url is not None:
            return f"webhook {urlsplit(self.to.url).netloc}"
        return f"webhook from ${self.to.url_env}"


@dataclass(frozen=True)
class AlarmSettings:
    channels: tuple[AlarmChannel, ...] = ()
    no_response_minutes: float | None = None  # None: the web section's (the page's alarm)
    repeat_minutes: float = 30.0  # at most one message per box and kind this often
    disk_free_mb: float = 500.0  # disk nearly full below this much free space for the database
    queue: int = 200  # messages waiting per channel; a full queue drops its oldest


def read_alarms(r: Reader, node: Marked | None) -> AlarmSettings:
    f = r.mapping(node, "alarms", ALARMS_KEYS)
    default = AlarmSettings()
    if not f:
        return default
    quiet = r.number(f["no_response_minutes"], "alarms.no_response_minutes", low=0, low_open=True) if (
        "no_response_minutes" in f) else None  # fmt: skip
    repeat = r.number(f["repeat_minutes"], "alarms.repeat_minutes", low=0) if "repeat_minutes" in f else None
    disk = r.number(f["disk_free_mb"], "alarms.disk_free_mb", low=0) if "disk_free_mb" in f else None
    size = r.number(f["queue"], "alarms.queue", low=1, high=100_000, integer=True) if "queue" in f else None
    channels = [
        channel
        for i, item in enumerate(r.listing(f.get("send"), "alarms.send"))
        if (channel := _channel(r, item, f"alarms.send[{i + 1}]")) is not None
    ]
    return AlarmSettings(
        tuple(channels),
        quiet,
        default.repeat_minutes if repeat is None else float(repeat),
        default.disk_free_mb if disk is None else float(disk),
        default.queue if size is None else size,
    )


def _refuse_secrets(r: Reader, node: Marked, where: str) -> None:
    if not node.is_mapping:
        return
    assert node.keys is not None
    for key in node.value:
        if key in SECRET_KEYS:
            r.error(
                node.keys[key],
                f"{where}.{key}: secrets are not read from the lab config; put it in an environment "
                f"variable and name that variable with '{SECRET_KEYS[key]}'",
            )


def _env_name(r: Reader, node: Marked | None, where: str) -> str | None:
    name = r.text(node, where)
    if name is not None and not _ENV_NAME.match(name):
        assert node is not None
        r.error(node.mark, f"{where}: expected the name of an environment variable (such as VIGIL_SMTP_PASSWORD), "
                           f"found '{name}'")  # fmt: skip
        return None
    return name


def _channel(r: Reader, node: Marked, where: str) -> AlarmChannel | None:
    before = len(r.problems)
    f = r.mapping(node, where, CHANNEL_KEYS, required=("kinds",))
    if f is None:
        return None
    if ("email" in f) == ("webhook" in f):
        r.error(node.mark, f"{where}: give exactly one of 'email' or 'webhook'")
        return None
    to: EmailTo | WebhookTo | None
    if "email" in f:
        _refuse_secrets(r, f["email"], f"{where}.email")
        to = _email(r, f["email"], f"{where}.email")
    else:
        _refuse_secrets(r, f["webhook"], f"{where}.webhook")
        to = _webhook(r, f["webhook"], f"{where}.webhook")
    kinds = _kinds(r, f["kinds"], f"{where}.kinds") if "kinds" in f else None
    quiet = _quiet_hours(r, f["quiet_hours"], f"{where}.quiet_hours") if "quiet_hours" in f else None
    if to is None or kinds is None or len(r.problems) > before:
        return None
    return AlarmChannel(to, kinds, quiet)


def _email(r: Reader, node: Marked, where: str) -> EmailTo | None:
    f = r.mapping(node, where, EMAIL_KEYS + tuple(SECRET_KEYS), required=("relay", "sender", "to"))
    if f is None:
        return None
    relay = r.text(f.get("relay"), f"{where}.relay")
    security = r.choice(f["security"], f"{where}.security", SECURITY) if "security" in f else "starttls"
    default_port = {"starttls": 587, "tls": 465, "none": 25}.get(security or "starttls", 587)
    port = r.number(f["port"], f"{where}.port", low=1, high=65535, integer=True) if "port" in f else default_port
    sender = _address(r, f.get("sender"), f"{where}.sender")
    to = [_address(r, item, f"{where}.to") for item in r.listing(f.get("to"), f"{where}.to", allow_single=True)]
    if "to" in f and not to:
        r.error(f["to"].mark, f"{where}.to: needs at least one address")
    user = r.text(f["user"], f"{where}.user") if "user" in f else None
    password_env = _env_name(r, f["password_env"], f"{where}.password_env") if "password_env" in f else None
    if ("user" in f) != ("password_env" in f) and "password" not in f:
        r.error(node.mark, f"{where}: give both 'user' and 'password_env' (a relay that wants a login), or neither")
    if relay is None or security is None or port is None or sender is None or not to or None in to:
        return None
    return EmailTo(relay, int(port), security, sender, tuple(a for a in to if a), user, password_env)


def _address(r: Reader, node: Marked | None, where: str) -> str | None:
    text = r.text(node, where)
    if text is not None and not re.fullmatch(r"[^@\s]+@[^@\s]+", text):
        assert node is not None
        r.error(node.mark, f"{where}: expected an e-mail address, found '{text}'")
        return None
    return text


def _webhook(r: Reader, node: Marked, where: str) -> WebhookTo | None:
    f = r.mapping(node, where, WEBHOOK_KEYS + tuple(SECRET_KEYS))
    if f is None:
        return None
    if ("url" in f) == ("url_env" in f):
        r.error(node.mark, f"{where}: give exactly one of 'url' or 'url_env' (a URL that holds its own secret)")
        return None
    url = None
    if "url" in f:
        url = r.text(f["url"], f"{where}.url")
        if url is not None:
            parts = urlsplit(url)
            if parts.scheme not in ("http", "https") or not parts.netloc:
                r.error(f["url"].mark, f"{where}.url: expected an http:// or https:// URL, found '{url}'")
                url = None
            elif parts.password:
                r.error(f["url"].mark, f"{where}.url: holds a password; give the URL with 'url_env' instead")
                url = None
    url_env = _env_name(r, f["url_env"], f"{where}.url_env") if "url_env" in f else None
    token_env = _env_name(r, f["token_env"], f"{where}.token_env") if "token_env" in f else None
    text_key = r.text(f["text_key"], f"{where}.text_key") if "text_key" in f else "text"
    if (url is None and url_env is None) or text_key is None:
        return None
    return WebhookTo(url, url_env, token_env, text_key)


def _kinds(r: Reader, node: Marked, where: str) -> frozenset[str] | None:
    if node.value == "all":
        return frozenset(ALARM_KINDS)
    kinds = set()
    for item in r.listing(node, where, allow_single=True):
        name = r.text(item, where)
        if name is None:
            continue
        if name not in ALARM_KINDS:
            r.error(
                item.mark,
                f"{where}: unknown alarm kind '{name}' (expected 'all' or some of "
                f"{', '.join(ALARM_KINDS)}){did_you_mean(name, ALARM_KINDS, aside=True)}",
            )
            return None
        kinds.add(name)
    if not kinds:
        r.error(node.mark, f"{where}: expected 'all' or a list of alarm kinds")
        return None
    return frozenset(kinds)


def _quiet_hours(r: Reader, node: Marked, where: str) -> QuietHours | None:
    text = r.text(node, where)
    match = _HOURS.match(text.strip()) if text else None
    if text is not None and match is None:
        r.error(node.mark, f"{where}: expected local hours such as '22:00-07:00', found '{text}'")
    if match is None:
        return None
    h1, m1, h2, m2 = (int(g) for g in match.groups())
    if (h1, m1) == (h2, m2):
        r.error(node.mark, f"{where}: start and end are the same time")
        return None
    return QuietHours(h1 * 60 + m1, h2 * 60 + m2)


def channel_secrets(channel: AlarmChannel, environ: dict[str, str] | None = None) -> dict[str, str]:
    """The channel's secrets from the environment, by role (password, token, url).

    Raises KeyError naming the first variable that is not set (or empty)."""
    env = os.environ if environ is None else environ
    wanted: dict[str, str | None] = (
        {"password": channel.to.password_env}
        if isinstance(channel.to, EmailTo)
        else {"url": channel.to.url_env, "token": channel.to.token_env}
    )
    found = {}
    for role, name in wanted.items():
        if name is None:
            continue
        value = env.get(name)
        if not value:
            raise KeyError(name)
        found[role] = value
    return found
