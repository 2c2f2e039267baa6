"""A two-stage session on the session page: its panels, drawn from the stored trials."""

from __future__ import annotations

import csv
import io
import sqlite3
import xml.etree.ElementTree as ET

import pytest
from web_samples import REPO, TestClient, record_session

from server.store.writer import Store
from server.web import create_app

TWO_STAGE = REPO / "protocols" / "two_stage.yaml"
SVG = "{http://www.w3.org/2000/svg}"


@pytest.fixture(scope="module")
def two_stage_db(tmp_path_factory):
    path = tmp_path_factory.mktemp("two_stage") / "lab.sqlite"
    with Store.open(path) as store:
        sid = record_session(
            store, box="wall-5", animal="RN-0517", protocol_path=TWO_STAGE, agent="q_learner", seed=31, minutes=10
        )
    return path, sid


def svgs(html: str) -> dict[str, ET.Element]:
    """Each plot of the page by its title."""
    found = {}
    for chunk in html.split("<svg")[1:]:
        node = ET.fromstring("<svg" + chunk.split("</svg>")[0] + "</svg>")
        title = next(t.text for t in node.iter(f"{SVG}text") if "pt" in (t.get("class") or "").split())
        found[title] = node
    return found


def marks(plot: ET.Element, classes: str) -> int:
    want = set(classes.split())
    groups = [g for g in plot.iter(f"{SVG}g") if want <= set((g.get("class") or "").split())]
    return sum(len(list(g)) for g in groups)


def test_first_choices_stay_bars_and_reward_probabilities(two_stage_db):
    path, sid = two_stage_db
    with TestClient(create_app(path)) as client:
        html = client.get(f"/sessions/{sid}").text
    plots = svgs(html)
    assert {"Second-stage reward probabilities", "First choices"} <= set(plots)
    assert "Choices and P(east)" not in plots  # the single-stage panel is not drawn as well
    with sqlite3.connect(path) as conn:
        rows = conn.execute(
            "SELECT choice, rewarded, transition, omitted2 FROM trials WHERE session_id = ? ORDER BY trial", (sid,)
        ).fetchall()
    chosen = [r for r in rows if r[0] is not None]
    assert chosen, "the virtual animal made no first choice"
    first = plots["First choices"]
    # one mark per first choice, of the shape its outcome and transition call for
    assert marks(first, "mk dot ch") == sum(1 for c, r, k, _ in chosen if r and k == "common")
    assert marks(first, "mk ring ch") == sum(1 for c, r, k, _ in chosen if not r and k == "common")
    assert marks(first, "mk square rare") == sum(1 for c, r, k, _ in chosen if k == "rare")
    assert marks(first, "mk square open") == sum(1 for c, r, k, _ in chosen if not r and k == "rare")
    # The stay bars' labels carry counts; count the same pairs here, independently.
    counts = {(True, "common"): [0, 0], (True, "rare"): [0, 0], (False, "common"): [0, 0], (False, "rare"): [0, 0]}
    for (c0, r0, k0, o0), (c1, *_) in zip(rows, rows[1:]):
        if c0 is not None and c1 is not None and not o0:
            counts[(bool(r0), k0)][0] += c0 == c1
            counts[(bool(r0), k0)][1] += 1
    stay = plots["Stay probability: repeating the first choice after ..."]
    labels = [t.text for t in stay.iter(f"{SVG}text") if (t.get("class") or "").split() == ["tl", "x"]]
    assert labels == [
        f"{'rewarded' if r else 'unrewarded'}, {k} ({counts[(r, k)][0]}/{counts[(r, k)][1]})"
        for r, k in ((True, "common"), (True, "rare"), (False, "common"), (False, "rare"))
    ]


def test_the_trials_csv_carries_the_second_stage(two_stage_db):
    path, sid = two_stage_db
    with TestClient(create_app(path)) as client:
        text = client.get(f"/api/sessions/{sid}/trials.csv").text
    table = list(csv.DictReader(io.StringIO(text)))
    assert {"state", "transition", "choice2", "response2", "latency2_s", "omitted2"} <= set(table[0])
    played = [row for row in table if row["state"]]
    assert played and all(row["transition"] in ("common", "rare") for row in played)
    assert all(row["response2"] in ("poke_north", "poke_south") for row in played if row["omitted2"] == "0")
