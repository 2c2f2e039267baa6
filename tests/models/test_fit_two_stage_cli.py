"""`vigil fit` on two-stage trials CSVs of our own (the simulator shares no code with
server.models)."""

from __future__ import annotations

import argparse
import csv
import io
import json
import math
import os
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest
from two_stage_simulation import reference_loglik, simulate_two_stage

from server.cli import fit as fit_cli

ROOT = Path(__file__).resolve().parents[2]
HEADER = "animal,session,trial,choice,transition,state,choice2,reward"


def _run(argv):
    parser = argparse.ArgumentParser(prog="vigil fit")
    fit_cli.add_arguments(parser)
    out, err = io.StringIO(), io.StringIO()
    code = fit_cli.run(parser.parse_args(argv), out=out, err=err)
    return code, out.getvalue(), err.getvalue()


@pytest.fixture(scope="module")
def two_stage_csv(tmp_path_factory):
    """Two invented mice, two sessions each, 4 % omissions, some second-stage omissions."""
    path = tmp_path_factory.mktemp("fit2") / "two_stage.csv"
    truth = {"MOUSE-K1": 0.2, "MOUSE-K2": 0.85}
    rows = {}
    for i, (animal, w) in enumerate(truth.items()):
        p = dict(alpha1=0.5, alpha2=0.5, beta1=5.0, beta2=5.0, w=w, persev=0.1, **{"lambda": 0.6})
        sim = []
        for day in ("day1", "day2"):
            part = simulate_two_stage(p, 90, seed=10 * i + len(sim), session=day, omission=0.04)
            # every 23rd choice trial: no second-stage response
            sim += [(s, t, a, tr, st, None if a and t % 23 == 0 else b, r) for s, t, a, tr, st, b, r in part]
        rows[animal] = sim
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(HEADER.split(","))
        for animal, sim in rows.items():
            for s, t, a, tr, st, b, r in sim:
                w.writerow([animal, s, t, a or "", tr or "", st or "", b or "", r if b or not a else 0.0])
    made = [tr for sim in rows.values() for _, _, a, tr, *_ in sim if a]
    p_common = sum(tr == "common" for tr in made) / len(made)
    return path, rows, p_common


def _reference_rows(sim):
    return [(s, t, a, tr, st, b, (r if b else 0.0)) for s, t, a, tr, st, b, r in sim]


def test_json_fit_matches_the_independent_likelihood_and_carries_the_stay_analysis(two_stage_csv):
    path, rows, p_common = two_stage_csv
    code, out, err = _run([str(path), "--json"])
    assert code == 0 and err == ""
    results = json.loads(out)
    assert [r["animal"] for r in results] == list(rows)
    for r in results:
        assert r["model"] == "hybrid" and set(r["params"]) == {
            "alpha1", "alpha2", "lambda", "beta1", "beta2", "w", "persev",
        }  # fmt: skip
        sim = _reference_rows(rows[r["animal"]])
        assert r["n_trials"] == sum(a is not None for _, _, a, *_ in sim)
        # BIC = k ln n - 2 ln L (Schwarz 1978), k = 7
        assert r["bic"] == pytest.approx(7 * math.log(r["n_trials"]) - 2 * r["loglik"])
        assert r["loglik"] == pytest.approx(reference_loglik(r["params"], sim, p_common), abs=1e-9)
        cells = r["stay"]["cells"]
        assert [c["condition"] for c in cells] == [
            "rewarded, common", "rewarded, rare", "unrewarded, common", "unrewarded, rare",
        ]  # fmt: skip
        assert set(r["stay"]["regression"]["coefficients"]) == {
            "intercept", "reward", "transition", "reward:transition",
        }  # fmt: skip


def test_compare_ranks_the_three_variants(two_stage_csv):
    path, rows, _ = two_stage_csv
    code, out, err = _run([str(path), "--compare", "--json", "--animal", "MOUSE-K2"])
    assert code == 0, err
    per_animal = [r for r in json.loads(out) if r["animal"] == "MOUSE-K2"]
    assert sorted(r["model"] for r in per_animal) == ["hybrid", "model_based", "model_free"]
    assert [r["rank"] for r in per_animal] == [1, 2, 3]
    bics = [r["bic"] for r in per_animal]
    assert bics == sorted(bics)
    k = {r["model"]: round((r["bic"] + 2 * r["loglik"]) / math.log(r["n_trials"])) for r in per_animal}
    assert k == {"hybrid": 7, "model_free": 6, "model_based": 4}
    # nested: the hybrid fits at least as well as either pure model
    ll = {r["model"]: r["loglik"] for r in per_animal}
    assert ll["hybrid"] >= max(ll["model_free"], ll["model_based"]) - 1e-6


def test_human_output_regressors_and_a_given_transition_probability(two_stage_csv, tmp_path):
    path, rows, _ = two_stage_csv
    reg_path = tmp_path / "regressors.csv"
    code, out, err = _run([str(path), "--model", "model_based", "--common-probability", "0.7",
                           "--regressors", str(reg_path), "--stay-lags", "2"])  # fmt: skip
    assert code == 0, err
    assert "model_based (maximum likelihood)" in out and "P(common) = 0.7 (given)" in out
    assert "reward:transition@2" in out and "unrewarded, rare" in out
    with open(reg_path, newline="") as fh:
        reg = list(csv.DictReader(fh))
    assert {"q_mf_left", "q_mb_right", "p_left", "q2_upper_a", "delta1", "delta2", "loglik"} <= set(reg[0])
    code, out, _ = _run([str(path), "--model", "model_based", "--common-probability", "0.7", "--json"])
    for fit in json.loads(out):
        mine = [float(r["loglik"]) for r in reg if r["animal"] == fit["animal"]]
        assert len(mine) == len(rows[fit["animal"]])
        assert sum(mine) == pytest.approx(fit["loglik"], abs=1e-6)


def test_models_of_the_other_kind_are_usage_errors(two_stage_csv, tmp_path):
    path, _, _ = two_stage_csv
    code, out, err = _run([str(path), "--model", "q_learning"])
    assert code == 2 and err.count("\n") == 1 and "single-stage model" in err
    code, _, err = _run([str(path), "--model", "hybird"])
    assert code == 2 and "did you mean 'hybrid'" in err
    code, _, err = _run([str(path), "--common-probability", "0.4"])
    assert code == 2 and "--common-probability" in err
    single = tmp_path / "single.csv"
    single.write_text("animal,session,trial,choice,reward\nR1,s1,1,L,1\nR1,s1,2,R,0\n")
    code, _, err = _run([str(single), "--model", "hybrid"])
    assert code == 2 and "two-stage model" in err
    code, _, err = _run([str(single), "--stay-lags", "2"])
    assert code == 2 and "two-stage trials only" in err


def test_as_a_process(two_stage_csv):
    path, rows, _ = two_stage_csv
    proc = subprocess.run(
        [sys.executable, "-m", "server.cli", "fit", str(path), "--model", "model_free", "--animal", "MOUSE-K1"],
        capture_output=True, text=True, timeout=120, env={**os.environ, "PYTHONPATH": str(ROOT)},
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr
    assert "model_free (maximum likelihood)" in proc.stdout and "MOUSE-K2" not in proc.stdout


GOOD = "M1,s1,1,left,common,upper,a,1"


@pytest.mark.parametrize(
    "bad, message",
    [
        ("M1,s1,2,left,often,upper,a,1", "transition must be common or rare, got 'often'"),
        ("M1,s1,2,left,common,,a,1", "state is empty"),
        ("M1,s1,2,,common,upper,,0", "an omission (empty choice) has no transition"),
        ("M1,s1,2,left,common,lower,c,1", "by a common transition, but state upper at line 2"),
        ("M1,s1,2,left,rare,upper,b,0", "by a rare transition, but that is its common state"),
        ("M1,s1,2,left,rare,lower,c,lots", "reward 'lots' is not a finite number"),
        ("M1,s1,1,left,rare,lower,c,0", "trials must increase within a session"),
        ("M1,s1,2,left,rare,lower", "expected 8 fields"),
    ],
)
def test_a_malformed_row_is_one_line_with_its_row_number(tmp_path, bad, message):
    path = tmp_path / "bad.csv"
    path.write_text(f"{HEADER}\n{GOOD}\n{bad}\nM1,s1,9,right,common,lower,d,0\n")
    code, out, err = _run([str(path)])
    assert code == 1 and out == ""
    assert err.count("\n") == 1 and message in err
    assert err.startswith(f"vigil fit: {path}:3: ")


def test_db_two_stage_sessions_are_read_from_their_columns_and_counted_like_the_page(tmp_path):
    # two sessions of protocols/two_stage.yaml in virtual time, stored as the lab stores them
    import numpy as np

    from hardware_stubs.agents import make_agent
    from hardware_stubs.emulated_box import EmulatedBox
    from server.cli.fit_sources import read_history
    from server.cli.two_stage_sources import read_two_stage_db
    from server.engine.caps import HardCaps
    from server.engine.stay import CONDITION_NAMES, stay_counts
    from server.engine.virtual import run_virtual
    from server.lab.assembly import build_session
    from server.models.two_stage import TwoStageTask
    from server.models.two_stage_trials import TwoStageRow, encode_two_stage, run_hybrid, stack_two_stage
    from server.protocol.load import load_protocol
    from server.store.queries import trial_records
    from server.store.writer import Store

    db = tmp_path / "lab.sqlite"
    protocol = load_protocol(ROOT / "protocols" / "two_stage.yaml")
    with Store.open(db) as store:
        for day, seed in enumerate((41, 42)):
            session = build_session(protocol, seed, HardCaps(max_rewards=250, max_minutes=8))
            box = EmulatedBox(protocol.wiring, make_agent("q_learner"), np.random.default_rng(seed))
            sid = store.begin_session(
                "shelf-2", "MOUSE-T3", protocol.name, str(protocol.source), protocol.sha256, seed,
                f"2031-06-0{day + 1}T09:00:00.000+02:00", {},
            )  # fmt: skip
            run_virtual(session, box, lambda records, sid=sid: [store.write(sid, r) for r in records])
            store.flush()
    with sqlite3.connect(db) as conn:
        stored = conn.execute(
            "SELECT t.session_id, t.trial, t.choice, t.transition, t.state, t.choice2, t.omitted2, t.reward"
            " FROM trials t JOIN sessions s ON s.id = t.session_id ORDER BY s.started_at, t.trial"
        ).fetchall()
        sessions = [r[0] for r in conn.execute("SELECT id FROM sessions ORDER BY started_at")]
        page_counts = [stay_counts(trial_records(conn, sid)) for sid in sessions]
    made = [r for r in stored if r[2]]
    assert len(made) > 30, "the virtual animal made too few first choices"
    # the rows the fit reads are the stored columns
    animal = read_two_stage_db(str(db), ["MOUSE-T3"], None, read_history(str(db), ["MOUSE-T3"], two_stage=True))[0]
    rows = [
        (int(r.session), r.trial, r.choice, r.state, r.common, r.choice2, r.omitted2, r.reward) for r in animal.rows
    ]
    assert rows == [
        (sid, n, c, st if c else None, (tr == "common") if c else None, c2, bool(om) if c else False, float(rw))
        for sid, n, c, tr, st, c2, om, rw in stored
    ]  # fmt: skip
    assert animal.task.common_state("west") == "north" and animal.task.common_state("east") == "south"
    code, out, err = _run(["--db", str(db), "--animal", "MOUSE-T3", "--model", "model_based", "--json",
                           "--common-probability", "0.8"])  # fmt: skip
    assert code == 0, err
    fit = json.loads(out)[0]
    assert fit["n_trials"] == len(made) and fit["model"] == "model_based"
    # what an online estimator sees: the protocol's own task and the trial records
    with sqlite3.connect(db) as conn:
        records = [(sid, r) for sid in sessions for r in trial_records(conn, sid)]
    task = TwoStageTask.from_protocol(protocol.two_stage)
    replay = encode_two_stage("MOUSE-T3", [TwoStageRow.from_record(str(sid), r) for sid, r in records], task)
    theta = {k: np.array([[v]]) for k, v in fit["params"].items()}
    ll, _ = run_hybrid(theta, stack_two_stage([replay]), (1,))
    assert float(ll[0, 0]) == pytest.approx(fit["loglik"], abs=1e-9)
    # the stay counts are the ones the session page draws, summed over the sessions
    cells = {c["condition"]: (c["stays"], c["pairs"]) for c in fit["stay"]["cells"]}
    for key, name in CONDITION_NAMES.items():
        assert cells[name] == (sum(c[key].stays for c in page_counts), sum(c[key].pairs for c in page_counts))
