"""The overview page: the lab-wide alarm strip and one tile per box.

The first render and every live update carry the same texts (`tiles.shown`); the page
script only swaps texts and flags, it never builds markup from data.
"""

from __future__ import annotations

import functools
from typing import Any
from urllib.parse import quote

from server.web.board import Snapshot, strip_of
from server.web.layout import icon, icon_templates
from server.web.markup import Safe, Template, el, join
from server.web.tiles import shown

# (field key, label, size) in the order a tile shows them: big figures, one-column facts,
# and wide rows for texts that run long
FIELDS = (
    ("trial", "trial", "big"),
    ("rewards", "rewards", "big"),
    ("accuracy", "accuracy", "big"),
    ("protocol", "protocol", "wide"),
    ("block", "block", ""),
    ("reversals", "reversals", ""),
    ("remaining", "time left", ""),
    ("elapsed", "elapsed", ""),
    ("since_input", "last input", ""),
    ("link", "box link", ""),
    ("step", "step", ""),
    ("last_rule", "last rule", "wide"),
)
# left out of a tile when the overview packs many boxes on one screen (the session page
# has them all)
EXTRA = frozenset(("protocol", "elapsed", "link", "step", "last_rule"))
# (most boxes, size name): the tiles shrink as the lab grows, so 32 fit on one laptop screen
SIZES = ((8, "roomy"), (16, "compact"))
DENSE = "dense"


def size_for(boxes: int) -> str:
    """The tile size for an overview of `boxes` boxes."""
    return next((name for most, name in SIZES if boxes <= most), DENSE)


def animal_href(animal: str) -> str:
    return "/animals/" + quote(animal, safe="")


def alarm_item(alarm: dict[str, str], box: str | None = None) -> Safe:
    parts = [icon(alarm["kind"])]
    if box is not None:
        parts.append(el("b", box))
    parts.append(el("span", alarm["text"]))
    return el("li", parts, class_=f"al al-{alarm['kind']}", data_kind=alarm["kind"])


def strip(tiles: list[dict[str, Any]]) -> Safe:
    items = strip_of(tiles)
    quiet = el("p", icon("ok"), el("span", "No alarms: every box within limits"), class_="quiet", hidden=bool(items))
    return el(
        "section",
        el("h2", "Alarms", class_="sr"),
        quiet,
        el("ul", [alarm_item(a, a["box"]) for a in items], class_="alarmlist"),
        id="strip",
        class_="strip",
        data_count=str(len(items)),
        role="status",
        aria_live="polite",
    )


@functools.cache
def controls(state: str) -> Safe:
    """The tile's buttons for a session in `state` (running, paused or ended)."""
    running = state != "ended"
    return el(
        "div",
        el("button", icon("paused"), "pause", type="button", data_act="pause", hidden=state != "running"),
        el("button", icon("running"), "resume", type="button", data_act="resume", hidden=state != "paused"),
        el("button", icon("ended_early"), "stop", type="button", data_act="stop", class_="danger", hidden=not running),
        class_="acts",
    )


def _tile_template(slot) -> Safe:
    figs = [
        el("div", el("dt", label), el("dd", slot(key), data_f=key), class_=" ".join(
            c for c in ("fig", size, "extra" if key in EXTRA else "", key) if c))
        for key, label, size in FIELDS
    ]  # fmt: skip
    return el(
        "article",
        el(
            "header",
            el("h2", slot("box"), class_="boxname"),
            el("a", slot("animal"), href=slot("animal_href"), class_="animal"),
            el(
                "p",
                el("span", slot("state_icon"), data_icon_slot="state"),
                el("span", slot("state"), data_f="state"),
                class_="state",
            ),
            class_="tile-head",
        ),
        el("ul", slot("alarms"), class_="alarmlist", data_alarms=True),
        el("dl", figs, class_="figs"),
        el("footer", el("a", "session ", slot("session_id"), " ›", href=slot("session_href")), slot("controls")),
        class_="tile",
        data_box=slot("box"),
        data_session=slot("session_id"),
        data_state=slot("state_name"),
        data_alarmed=slot("alarmed"),
    )


# Built once: an overview of 32 tiles is rendered several times a second under load, so a
# tile is a fill of this template rather than a fresh tree of elements.
TILE = Template(_tile_template)


def tile_markup(tile: dict[str, Any], *, with_controls: bool) -> Safe:
    state = tile["state"]
    values: dict[str, Any] = dict(shown(tile))
    values.update(
        box=tile["box"],
        animal=tile["animal"],
        animal_href=animal_href(tile["animal"]),
        state_icon=icon(state),
        state_name=state,
        alarms=join(*(alarm_item(a) for a in tile["alarms"])),
        alarmed="yes" if tile["alarms"] else "no",
        session_id=str(tile["session_id"]),
        session_href=f"/sessions/{tile['session_id']}",
        controls=controls(state) if with_controls else Safe(""),
    )
    return TILE.fill(values)


def operator_key() -> Safe:
    return el(
        "form",
        el(
            "label",
            "Operator token ",
            el(
                "input",
                type="password",
                id="optoken",
                autocomplete="off",
                placeholder="needed to pause, stop or add a note",
            ),
        ),
        el("output", id="opsay", aria_live="polite"),
        class_="opkey",
        id="opkey",
    )


def overview_body(snap: Snapshot, *, with_controls: bool) -> Safe:
    if snap.tiles:
        grid = el(
            "div",
            [tile_markup(t, with_controls=with_controls) for t in snap.tiles],
            class_="grid",
            id="board",
            data_boxes="\n".join(t["box"] for t in snap.tiles),
            data_size=size_for(len(snap.tiles)),
        )
    else:
        grid = el("p", "No sessions yet.", class_="empty", id="board", data_boxes="")
    # freshness first: a reader must know at once whether what follows is current
    return el(
        "div",
        el(
            "p",
            "as of ",
            el("time", snap.wall_time, id="asof"),
            el("span", " · live updates", id="feed"),
            el("span", f" · {snap.store}" if snap.store else "", id="storeline"),
            class_="asof",
        ),
        strip(snap.tiles),
        operator_key() if with_controls else None,
        grid,
        icon_templates(),
        class_="overview",
    )
