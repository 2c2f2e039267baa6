"""The lab config's `web` section: where the status page listens and the tokens that guard it."""

from __future__ import annotations

import ipaddress
from dataclasses import dataclass

from server.protocol.marked import Marked
from server.protocol.reader import Reader

WEB_KEYS = ("host", "port", "operator_token", "viewer_token", "no_response_minutes")
MIN_TOKEN_CHARS = 16


def is_loopback(host: str) -> bool:
    """True when `host` only accepts connections from this computer."""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


@dataclass(frozen=True)
class WebSettings:
    """The status page: where it listens and the tokens that guard it (config key `web`).

    Listening beyond this computer needs both tokens: the viewer token to read, the
    operator token to pause, stop or annotate.
    """

    host: str = "127.0.0.1"
    port: int = 8642
    operator_token: str | None = None
    viewer_token: str | None = None
    no_response_minutes: float = 5.0  # alarm when a running box saw no input this long


def read_web(r: Reader, node: Marked | None) -> WebSettings:
    f = r.mapping(node, "web", WEB_KEYS)
    default = WebSettings()
    if not f:
        return default
    host = r.text(f["host"], "web.host") if "host" in f else default.host
    port = r.number(f["port"], "web.port", low=1, high=65535, integer=True) if "port" in f else default.port
    tokens = {}
    for key in ("operator_token", "viewer_token"):
        token = r.text(f[key], f"web.{key}") if key in f else None
        if token is not None and len(token) < MIN_TOKEN_CHARS:
            r.error(f[key].mark, f"web.{key}: expected at least {MIN_TOKEN_CHARS} characters, found {len(token)}")
            token = None
        tokens[key] = token
    quiet = (
        r.number(f["no_response_minutes"], "web.no_response_minutes", low=0, low_open=True)
        if "no_response_minutes" in f
        else default.no_response_minutes
    )
    host = host or default.host
    if "host" in f and not is_loopback(host) and not (tokens["operator_token"] and tokens["viewer_token"]):
        r.error(
            f["host"].mark,
            f"web.host: listening on '{host}' reaches other computers; "
            "set web.operator_token and web.viewer_token first, or use 127.0.0.1",
        )
    return WebSettings(
        host,
        int(port or default.port),
        tokens["operator_token"],
        tokens["viewer_token"],
        float(quiet or default.no_response_minutes),
    )
