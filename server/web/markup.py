"""HTML and SVG built from Python values, escaped by default.

Every string that reaches a page goes through `el`, which escapes text and attribute values
unless they are already `Safe` (markup built here). Box and animal names are typed by people
and stored as given, so nothing from the store or the lab is ever pasted in raw.
"""

from __future__ import annotations

import html
from collections.abc import Iterable
from typing import Any

# Tags written without a closing tag (HTML void elements).
_VOID = frozenset(("br", "hr", "img", "input", "link", "meta", "col", "source", "wbr"))


class Safe(str):
    """Markup that is already escaped; `el` passes it through untouched."""

    __slots__ = ()


def esc(value: Any) -> Safe:
    """Text for a page: escaped, quotes included (safe inside attribute values too)."""
    if isinstance(value, Safe):
        return value
    return Safe(html.escape("" if value is None else str(value), quote=True))


def _attr_name(key: str) -> str:
    # Python keywords and dashes: class_ -> class, data_box -> data-box, aria_label -> aria-label.
    return key.rstrip("_").replace("_", "-")


def attrs(values: dict[str, Any]) -> Safe:
    parts = []
    for key, value in values.items():
        if value is None or value is False:
            continue
        name = _attr_name(key)
        if value is True:
            parts.append(f" {name}")
        else:
            parts.append(f' {name}="{esc(value)}"')
    return Safe("".join(parts))


def _children(children: Iterable[Any]) -> str:
    out = []
    for child in children:
        if child is None or child is False:
            continue
        if isinstance(child, (list, tuple)):
            out.append(_children(child))
        else:
            out.append(esc(child))
    return "".join(out)


def el(tag: str, *children: Any, **attributes: Any) -> Safe:
    """One element; children may be text, Safe markup, None (skipped) or nested lists."""
    opening = f"<{tag}{attrs(attributes)}>"
    if tag in _VOID:
        return Safe(opening)
    return Safe(f"{opening}{_children(children)}</{tag}>")


def join(*parts: Any) -> Safe:
    return Safe(_children(parts))


class Template:
    """Markup built once with `el`, with named slots filled many times (a hot page).

    `build` receives a `slot(name)` function and returns markup; each slot may sit in text
    or in an attribute value, and its value is escaped at `fill` time like any other text
    (a `Safe` value goes in as it is).
    """

    _MARK = "\x00"  # never produced by escaping, so it only appears where a slot was put

    def __init__(self, build):
        text = build(lambda name: Safe(f"{self._MARK}{name}{self._MARK}"))
        parts = text.split(self._MARK)
        self._literals = parts[0::2]
        self._slots = parts[1::2]

    @property
    def slots(self) -> tuple[str, ...]:
        return tuple(self._slots)

    def fill(self, values: dict[str, Any]) -> Safe:
        out = [self._literals[0]]
        for slot, literal in zip(self._slots, self._literals[1:]):
            out.append(esc(values[slot]))
            out.append(literal)
        return Safe("".join(out))
