"""The page shell and the alarm icons shared by every page.

Icons are simple shapes of our own, each paired with words wherever it appears, so an
alarm reads the same to someone who cannot tell the colours apart or stands across a room.
"""

from __future__ import annotations

import functools
import hashlib
from pathlib import Path
from typing import Any

from server.web.markup import Safe, el, join

# Changes with the vendored files' contents, so a browser never keeps a stale copy.
ASSET_VERSION = hashlib.sha256(
    b"".join((Path(__file__).parent / "assets" / name).read_bytes() for name in ("vigil.css", "vigil.js"))
).hexdigest()[:10]

_ICON_PATHS = {
    # two chain halves pulled apart, with a slash
    "link_lost": '<path d="M3 9h6v6H3zM15 9h6v6h-6z"/><path class="cut" d="M8 20 16 4"/>',
    # hourglass
    "no_response": '<path d="M6 3h12L13 12l5 9H6l5-9z"/>',
    # a full measure: container with its top bar
    "cap_reached": '<path d="M5 8h14v13H5z"/><path class="cut" d="M3 4h18"/>',
    # a square with a cross
    "ended_early": '<path d="M4 4h16v16H4z"/><path class="cut" d="M8 8l8 8M16 8l-8 8"/>',
    # a triangle with a bar and a dot
    "rule_alarm": '<path d="M12 2 23 21H1z"/><path class="cut" d="M12 9v6M12 18v.5"/>',
    # a circle with a tick
    "ok": '<circle cx="12" cy="12" r="9"/><path class="cut" d="M7.5 12.5l3 3 6-7"/>',
    "running": '<path d="M7 4l12 8-12 8z"/>',
    "paused": '<path d="M6 4h4v16H6zM14 4h4v16h-4z"/>',
    "ended": '<path d="M6 21V3M6 4h12l-3 4 3 4H6"/>',
}


@functools.cache
def icon(kind: str) -> Safe:
    paths = _ICON_PATHS.get(kind, _ICON_PATHS["ended_early"])
    return el("svg", Safe(paths), viewBox="0 0 24 24", class_=f"ic ic-{kind}", aria_hidden="true", focusable="false")


@functools.cache
def icon_templates() -> Safe:
    """Hidden copies of every icon, cloned by the page script for live updates."""
    return el("template", [el("span", icon(k), data_icon=k) for k in _ICON_PATHS], id="icons")


def page(title: str, body: Any, *, lab_name: str, body_class: str, read_only: bool, status: Any = None) -> str:
    """A whole HTML document; `body` is Safe markup built with `el`."""
    nav = el(
        "nav",
        el("a", "Boxes", href="/"),
        el("a", "Sessions", href="/sessions"),
        el("a", "Animals", href="/animals"),
        el("a", "API", href="/api/openapi.json"),
    )
    mode = el("span", "read-only" if read_only else "live", class_="mode")
    head = el(
        "head",
        el("meta", charset="utf-8"),
        el("meta", name="viewport", content="width=device-width, initial-scale=1"),
        el("title", f"{title} · Vigil"),
        el("link", rel="stylesheet", href=f"/assets/vigil.css?v={ASSET_VERSION}"),
        el("link", rel="icon", href="/assets/vigil.svg", type="image/svg+xml"),
        el("script", src=f"/assets/vigil.js?v={ASSET_VERSION}", defer=True),
    )
    header = el(
        "header",
        el("a", "Vigil", href="/", class_="brand"),
        el("span", lab_name, class_="labname"),
        mode,
        nav,
        status,
        class_="masthead",
    )
    doc = join(
        Safe("<!doctype html>"), el("html", head, el("body", header, el("main", body), class_=body_class), lang="en")
    )
    return str(doc)
