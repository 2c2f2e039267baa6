"""The pages a PI reads across days (animal, animals, cohort), the session page's shared
trial axis, PCA panel and rule firings in words, and the page defects fixed with them."""

from __future__ import annotations

import re
import statistics

import pytest
from web_samples import REVERSAL

from server.protocol.load import load_protocol
from server.protocol.model import Pavlovian
from server.web import plots
from server.web.day_plots import spread
from server.web.pca import classify, pca_parts
from server.web.session_page import control_form
from server.web.svg import Plot
from server.web.tiles import tile_from_store
from server.web.words import firing_words, quantity

CS = Pavlovian(cs_step="cs", lever="press", magazine="mag", cs_seconds=8.0)


def _cs_trials(lever: list[tuple[int, float]], magazine: list[tuple[int, float]], n: int) -> list[dict]:
    """n CS trials; `lever` and `magazine` give (count, first latency) for the first trials
    that had each response, the rest had none."""
    trials = []
    for i in range(n):
        counts, first = {}, {}
        if i < len(lever):
            counts["cs.press"], first["cs.press"] = lever[i]
        if i < len(magazine):
            counts["cs.mag"], first["cs.mag"] = magazine[i]
        trials.append({"trial": i + 1, "steps": [["cs", 10.0 * i], ["us", 10.0 * i + 8]], "counts": counts,
                       "first_s": first, "interrupted": 0})  # fmt: skip
    return trials


def test_pca_parts_match_the_worked_examples():
    # Worked numbers from Meyer et al. (2012), PLoS ONE 7:e38987, as restated in CHECKS:
    # LP 90, CE 10, P(lever) 0.96, P(magazine) 0.24, latencies 1.5 s vs 7.0 s, CS 8 s
    # -> bias 0.8, probability difference 0.72, latency score 0.6875, PCA 0.7358.
    # 25 trials: 24 with a lever press (mean latency 1.5 s counting the missed trial as 8 s)
    # and 6 with a magazine entry (mean 7.0 s counting the 19 missed trials as 8 s).
    lever = [(4 if i < 18 else 3, 29.5 / 24) for i in range(24)]  # 18 * 4 + 6 * 3 = 90 presses
    magazine = [(2 if i < 4 else 1, 23 / 6) for i in range(6)]  # 4 * 2 + 2 = 10 entries
    parts = pca_parts(_cs_trials(lever, magazine, 25), CS)
    assert parts is not None and parts.trials == 25
    assert parts.bias == pytest.approx(0.8)
    assert parts.probability == pytest.approx(0.72)
    assert parts.latency == pytest.approx(0.6875)
    assert parts.index == pytest.approx(0.7358, abs=1e-4)
    assert classify(parts.index) == "sign-tracking"
    # The goal-tracker example: LP 5, CE 45, P 0.2 vs 0.9, latencies 7.0 s vs 2.5 s
    # -> -0.8, -0.7, -0.5625 -> PCA -0.6875 (10 trials: 2 with presses, 9 with entries).
    lever = [(3, 3.0), (2, 3.0)]
    magazine = [(5, 17 / 9)] * 9
    parts = pca_parts(_cs_trials(lever, magazine, 10), CS)
    assert parts is not None
    assert (parts.bias, parts.probability, parts.latency) == pytest.approx((-0.8, -0.7, -0.5625))
    assert parts.index == pytest.approx(-0.6875)
    assert classify(parts.index) == "goal-tracking"


def test_rule_firing_in_words():
    rules = {rule.name: rule for rule in load_protocol(REVERSAL).rules}
    said = firing_words("learned", [{"reverse": ["west", "east"]}], {"p_prefers_correct": 0.9612}, rules["learned"])
    assert said == "reversed west/east because p_prefers_correct 0.96 ≥ 0.95 for 5 trials (rule learned)"
    said = firing_words("streak_backstop", [{"reverse": ["west", "east"]}], {"streak": 8.0}, rules["streak_backstop"])
    assert said == "reversed west/east because streak 8 ≥ 8 (rule streak_backstop)"
    # without the protocol that ran: the values read, still no raw action
    said = firing_words("disengaged", [{"alarm": "check the levers"}], {"omission_rate(10)": 0.8}, None)
    assert said == "raised the alarm “check the levers” because omission_rate(10) 0.80 (rule disengaged)"


def test_every_model_quantity_has_a_plain_subtitle(read_only, lab_db):
    page = read_only.get(f"/sessions/{lab_db['second']}").text
    for name in ("alpha", "beta", "exploration"):
        title, subtitle = quantity(name)
        assert title in page and subtitle in page
    assert "inverse temperature β" in page and "choice consistency; higher = exploits more" in page
    animal = read_only.get("/animals/RN-0501").text
    assert quantity("beta")[1] in animal and quantity("alpha")[1] in animal


def _trial_axes(page: str) -> list[tuple[str, str]]:
    return re.findall(r'<svg [^>]*data-axis="trial" data-x0="([^"]+)" data-x1="([^"]+)"', page)


def test_trial_indexed_panels_share_one_axis(read_only, lab_db):
    page = read_only.get(f"/sessions/{lab_db['second']}").text
    axes = _trial_axes(page)
    assert len(axes) == 4  # choices, alpha, beta, exploration
    assert len(set(axes)) == 1
    pav = read_only.get(f"/sessions/{lab_db['pav']}").text
    assert len(_trial_axes(pav)) == 1  # the PCA panel


def test_choice_rows_are_labelled_with_their_options(read_only, lab_db):
    page = read_only.get(f"/sessions/{lab_db['second']}").text
    choice = page[page.index('aria-label="Choices and P(') :]
    choice = choice[: choice.index("</svg>")]
    labels = re.findall(r'<text [^>]*class="tl y"[^>]*>([^<]*)</text>', choice)
    # options in order: east on the top row (the probability drawn is P(east)), west below
    assert labels[0] == "west" and labels[-1] == "east" and "P(east)" in choice


def test_pavlovian_session_has_pca_panel_and_magazine_entries(read_only, lab_db):
    page = read_only.get(f"/sessions/{lab_db['pav']}").text
    assert "Pavlovian conditioned approach (PCA index)" in page
    assert "sign-tracking" in page.split("pca-verdict")[1][:300]
    assert "magazine (entries)" in page  # the cumulative record's magazine line
    goal = read_only.get(f"/sessions/{lab_db['goal']}").text
    assert "goal-tracking" in goal.split("pca-verdict")[1][:300]


def test_count_axes_have_whole_ticks():
    # 1 response (the record tops out at 1.05): the automatic ticks would be 0, 0.5, 1
    plot = Plot((0, 10), (0, 1.05), title="t", whole_y=True)
    svg = plot.render()
    ys = re.findall(r'class="tl y"[^>]*>([^<]*)<', svg)
    assert ys and all(re.fullmatch(r"\d+", y) for y in ys)
    # without whole_y the same range gets half ticks (what the cumulative record had)
    halves = re.findall(r'class="tl y"[^>]*>([^<]*)<', Plot((0, 10), (0, 1.05), title="t").render())
    assert "0.5" in halves or "1.5" in halves, halves
    inputs = [{"name": "press", "value": 1, "t": t} for t in (5.0,)]
    record = plots.cumulative_record(
        session={"settings": {"wiring": {"inputs": {"press": "lever_press"}, "outputs": {}}}, "rewards": 0},
        inputs=inputs, pulses=[], trials=[], blocks=[], firings=[], pauses=[], end_t=60.0,
    )  # fmt: skip
    ys = re.findall(r'class="tl y"[^>]*>([^<]*)<', record)
    assert ys and all(re.fullmatch(r"\d+", y) for y in ys), ys


def test_session_controls_offer_pause_or_resume_by_state():
    running = control_form({"id": 4}, paused=False)
    assert 'value="pause"' in running and 'value="resume"' not in running
    paused = control_form({"id": 4}, paused=True)
    assert 'value="resume"' in paused and 'value="pause"' not in paused


def test_time_left_counts_the_runs_minutes():
    session = {"box": "b", "animal": "a", "protocol": "p", "id": 1, "started_at": "2031-05-12T09:00:00+00:00",
               "ended_at": None, "end_reason": None, "trials": 0, "rewards": 3,
               "settings": {"limits": {"max_minutes": 60, "max_rewards": 200}, "run_minutes": 3}}  # fmt: skip
    status = {"block": None, "accuracy": None, "last_input_t": None, "link_lost": False, "cap_events": 0,
              "paused": False, "alarm": None, "last_t": None}  # fmt: skip
    from datetime import datetime

    tile = tile_from_store(session, status, None, datetime.fromisoformat("2031-05-12T09:01:00+00:00"), 300.0)
    assert tile["remaining_s"] == pytest.approx(120.0)  # 3 min run, 1 min in: not 59 min
    assert tile["max_rewards"] == 200


def test_animal_page(read_only, lab_db):
    page = read_only.get("/animals/RN-0501").text
    table = page[page.index('class="tbl sessions-of-animal"') :]
    table = table[: table.index("</table>")]
    cells = [re.findall(r"<td>(.*?)</td>", row) for row in re.findall(r"<tr>(.*?)</tr>", table)[1:]]
    assert [row[4] for row in cells] == ["1", "2", "2"]  # the training stage, not the block
    assert all(re.fullmatch(r"\d+/200", row[6]) for row in cells)  # rewards against the cap
    assert "Training stages" in page and "advanced" in page
    for title in ("Learning curve: accuracy per session", "Reversals and trials to criterion",
                  "Rewards per session", "learning rate α at the end of each session"):  # fmt: skip
        assert title in page
    assert "1: 05-10" in page and "3: 05-12" in page  # sessions dated on the axis


def test_animals_list_and_cohort(read_only, lab_db):
    animals = read_only.get("/animals").text
    for animal in ("RN-0501", "RN-0502", "RN-0504"):
        assert f'href="/animals/{animal}"' in animals
    assert 'href="/cohorts/lever%20autoshaping"' in animals
    cohort = read_only.get("/cohorts/lever autoshaping")
    assert cohort.status_code == 200
    assert cohort.text.count('href="/animals/RN-05') == 2
    assert "PCA index by session number" in cohort.text
    assert read_only.get("/cohorts/no such protocol").status_code == 404


def test_cohort_spread_matches_the_standard_library():
    series = [[0.5, 0.6, 0.9], [0.55, 0.7], [0.4, None, 0.8], [0.6, 0.65, 0.85, 0.9]]
    rows = spread(series)
    assert [r[0] for r in rows] == [1, 2, 3, 4] and [r[4] for r in rows] == [4, 3, 3, 1]
    for (_, med, q1, q3, _n), i in zip(rows, range(4)):
        values = [s[i] for s in series if i < len(s) and s[i] is not None]
        assert med == pytest.approx(statistics.median(values))
        if len(values) > 1:  # numpy's linear percentiles are the "inclusive" method (Python docs)
            lo, _, hi = statistics.quantiles(values, n=4, method="inclusive")
            assert (q1, q3) == pytest.approx((lo, hi))
