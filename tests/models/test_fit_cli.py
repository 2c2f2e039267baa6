"""`vigil fit` through its run() entry point and as a process, on files of our own."""

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

import numpy as np
import pytest
from model_simulation import as_rows, reference_loglik, simulate

from server.cli import fit as fit_cli

HEADER = "animal,session,trial,choice,reward"


def _parse(argv):
    parser = argparse.ArgumentParser(prog="vigil fit")
    fit_cli.add_arguments(parser)
    return parser.parse_args(argv)


def _run(argv):
    out, err = io.StringIO(), io.StringIO()
    code = fit_cli.run(_parse(argv), out=out, err=err)
    return code, out.getvalue(), err.getvalue()


@pytest.fixture(scope="module")
def trials_csv(tmp_path_factory):
    """Three invented rats, two sessions each, 8 % omissions, a 3-armed task."""
    rng = np.random.default_rng(42)
    path = tmp_path_factory.mktemp("fit") / "trials.csv"
    truth = {"RAT-A1": (0.3, 4.0), "RAT-B2": (0.6, 2.5), "RAT-C3": (0.15, 6.0)}
    rows = []
    for animal, (alpha, beta) in truth.items():
        for day in ("d1", "d2"):
            ch, rw = simulate(
                "q_learning", {"alpha": np.array([alpha]), "beta": np.array([beta])}, 100, rng, omission=0.08
            )
            rows += [
                (animal, s, t, c or "", r)
                for (s, t, c, r) in as_rows(ch, rw, labels=("west", "east", "centre"), session=day)[0]
            ]
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(HEADER.split(","))
        w.writerows(rows)
    return path, rows


def _trials_of(rows, animal):
    return [(s, c or None, float(r)) for a, s, _, c, r in rows if a == animal]


def test_json_fit_matches_the_independent_likelihood(trials_csv):
    path, rows = trials_csv
    code, out, err = _run([str(path), "--json"])
    assert code == 0 and err == ""
    results = json.loads(out)
    assert [r["animal"] for r in results] == ["RAT-A1", "RAT-B2", "RAT-C3"]
    for r in results:
        assert {"animal", "model", "params", "loglik", "n_trials", "aic", "bic"} <= set(r)
        trials = _trials_of(rows, r["animal"])
        assert r["n_trials"] == sum(c is not None for _, c, _ in trials)
        # BIC = k ln n - 2 ln L, AIC = 2k - 2 ln L (Wilson & Collins 2019)
        assert r["bic"] == pytest.approx(2 * math.log(r["n_trials"]) - 2 * r["loglik"])
        assert r["aic"] == pytest.approx(4 - 2 * r["loglik"])
        assert r["loglik"] == pytest.approx(reference_loglik("q_learning", r["params"], trials), abs=1e-9)
        lo, hi = r["intervals"]["alpha"]
        assert lo <= r["params"]["alpha"] <= hi


def test_table_output_by_default(trials_csv):
    code, out, _ = _run([str(trials_csv[0]), "--model", "q_sticky", "--map"])
    assert code == 0
    assert "q_sticky (MAP under the declared priors)" in out
    assert all(a in out for a in ("RAT-A1", "RAT-B2", "RAT-C3"))
    assert "kappa" in out.splitlines()[1]


def test_compare_ranks_every_model_by_bic(trials_csv):
    code, out, _ = _run([str(trials_csv[0]), "--compare", "--json"])
    assert code == 0
    rows = json.loads(out)
    per_animal = [r for r in rows if r["animal"] is not None]
    totals = [r for r in rows if r["animal"] is None]
    assert len(per_animal) == 12 and len(totals) == 4
    for animal in ("RAT-A1", "RAT-B2", "RAT-C3"):
        mine = [r for r in per_animal if r["animal"] == animal]
        assert [r["rank"] for r in mine] == [1, 2, 3, 4]
        assert [r["bic"] for r in mine] == sorted(r["bic"] for r in mine)
        assert {r["model"] for r in mine} == set(fit_cli.CHOICE_MODELS)
    for t in totals:
        assert t["bic"] == pytest.approx(sum(r["bic"] for r in per_animal if r["model"] == t["model"]))
    assert [t["rank"] for t in totals] == [1, 2, 3, 4]
    code, table, _ = _run([str(trials_csv[0]), "--compare"])
    assert code == 0 and "(all)" in table


def test_regressors_file(trials_csv, tmp_path):
    path, rows = trials_csv
    out_csv = tmp_path / "reg.csv"
    code, _, _ = _run([str(path), "--regressors", str(out_csv), "--json"])
    assert code == 0
    with open(out_csv, newline="") as fh:
        got = list(csv.DictReader(fh))
    assert len(got) == len(rows)
    labels = ("west", "east", "centre")
    for row, src in zip(got, rows):
        assert (row["animal"], row["session"], row["trial"]) == (src[0], src[1], str(src[2]))
        probs = [float(row[f"p_{lab}"]) for lab in labels]
        assert sum(probs) == pytest.approx(1.0)
        assert (row["prediction_error"] == "") == (src[3] == "")
    first = got[0]
    assert [float(first[f"value_{lab}"]) for lab in labels] == [0.0, 0.0, 0.0]


@pytest.mark.parametrize(
    "text, message",
    [
        ("", r":1: empty file; expected header animal,session,trial,choice,reward$"),
        ("animal,session,trial,choice\n", r":1: header must be animal,session,trial,choice,reward$"),
        (f"{HEADER}\nR1,s1,1,L,1\nR1,s1,2,L,many\n", r":3: reward 'many' is not a finite number$"),
        (f"{HEADER}\nR1,s1,1,L,nan\n", r":2: reward 'nan' is not a finite number$"),
        (f"{HEADER}\nR1,s1,1,L\n", r":2: expected 5 fields \(animal,session,trial,choice,reward\), got 4$"),
        (f"{HEADER}\nR1,s1,one,L,1\n", r":2: trial 'one' is not a whole number$"),
        (f"{HEADER}\n,s1,1,L,1\n", r":2: animal is empty$"),
        (
            f"{HEADER}\nR1,s1,1,L,1\nR1,s1,3,L,1\nR1,s1,2,R,0\n",
            r":4: trial 2 of session s1 \(animal R1\) comes after trial 3; ",
        ),
        (
            f"{HEADER}\nR1,s1,1,L,1\nR1,s2,1,L,1\nR1,s1,2,R,0\n",
            r":4: session s1 of animal R1 resumes after session s2; ",
        ),
        (f"{HEADER}\n", r":2: no trials after the header$"),
    ],
)
def test_bad_csv_names_file_and_line(tmp_path, text, message):
    path = tmp_path / "bad.csv"
    path.write_text(text)
    code, out, err = _run([str(path)])
    assert code == 1 and out == ""
    line = err.strip()
    assert "\n" not in line
    assert line.startswith(f"vigil fit: {path}:")
    assert __import__("re").search(message, line), line


def test_missing_file_and_usage_errors(tmp_path, trials_csv):
    code, _, err = _run([str(tmp_path / "nope.csv")])
    assert code == 1 and "cannot read" in err
    assert _run([])[0] == 2
    code, _, err = _run([str(trials_csv[0]), "--db", str(tmp_path / "x.sqlite")])
    assert code == 2 and "one of the two" in err
    code, _, err = _run([str(trials_csv[0]), "--model", "q_leaning"])
    assert code == 2 and "did you mean 'q_learning'" in err
    code, _, err = _run([str(trials_csv[0]), "--animal", "RAT-Z9"])
    assert code == 1 and "no trials for animal 'RAT-Z9'" in err


def test_animals_without_choices_are_skipped(tmp_path):
    path = tmp_path / "gaps.csv"
    path.write_text(f"{HEADER}\nR1,s1,1,,0\nR1,s1,2,,0\nR2,s1,1,L,1\nR2,s1,2,R,0\nR2,s1,3,L,1\n")
    code, out, err = _run([str(path), "--json"])
    assert code == 0 and "animal R1 has no choice trials; skipped" in err
    assert [r["animal"] for r in json.loads(out)] == ["R2"]
    path.write_text(f"{HEADER}\nR1,s1,1,,0\n")
    code, _, err = _run([str(path)])
    assert code == 1 and "nothing to fit" in err


def test_bad_input_as_a_process_gives_one_line_and_no_traceback(tmp_path):
    path = tmp_path / "bad.csv"
    path.write_text(f"{HEADER}\nR1,s1,1,L,oops\n")
    proc = subprocess.run(
        [sys.executable, "-m", "server.cli.fit", str(path)], capture_output=True, text=True, timeout=60
    )
    assert proc.returncode == 1
    assert proc.stderr.strip() == f"vigil fit: {path}:2: reward 'oops' is not a finite number"
    assert "Traceback" not in proc.stderr


def _make_db(path, rows):
    con = sqlite3.connect(path)
    con.execute("CREATE TABLE sessions (id INTEGER PRIMARY KEY, animal TEXT, started_at TEXT, protocol TEXT)")
    con.execute(
        "CREATE TABLE trials (session_id INTEGER, trial INTEGER, choice TEXT NULL, "
        "reward REAL, omission INTEGER, block TEXT)"
    )
    for sid, animal, started, trials in rows:
        con.execute("INSERT INTO sessions VALUES (?, ?, ?, 'bandit')", (sid, animal, started))
        con.executemany("INSERT INTO trials VALUES (?, ?, ?, ?, ?, 'b1')", [(sid, *t) for t in trials])
    con.commit()
    con.close()


def test_database_source_orders_sessions_by_start_and_reads_only(tmp_path, trials_csv):
    _, rows = trials_csv
    by_day = {d: [(t, c or None, r, 0) for a, s, t, c, r in rows if a == "RAT-A1" and s == d] for d in ("d1", "d2")}
    # an omission flagged in the omission column, whatever the choice column says
    t, c, r, _ = by_day["d2"][5]
    by_day["d2"][5] = (t, "west", 0.0, 1)
    db = tmp_path / "lab.sqlite"
    # session ids run against start times: order must follow started_at
    _make_db(
        db,
        [
            (7, "RAT-A1", "2026-03-02T09:00:00+01:00", by_day["d2"]),
            (3, "RAT-A1", "2026-03-01T09:00:00+01:00", by_day["d1"]),
            (5, "RAT-ZZ", "2026-03-01T10:00:00+01:00", by_day["d1"][:10]),
        ],
    )
    stamp = os.stat(db).st_mtime_ns
    code, out, err = _run(["--db", str(db), "--animal", "RAT-A1", "--json"])
    assert code == 0, err
    (fit,) = json.loads(out)
    trials = [("3", c, float(r)) for _, c, r, _ in by_day["d1"]] + [
        ("7", None if o else c, float(r)) for _, c, r, o in by_day["d2"]
    ]
    assert fit["n_trials"] == sum(c is not None for _, c, _ in trials)
    assert fit["loglik"] == pytest.approx(reference_loglik("q_learning", fit["params"], trials), abs=1e-9)
    assert os.stat(db).st_mtime_ns == stamp
    code, out, _ = _run(["--db", str(db), "--json"])
    assert code == 0 and [f["animal"] for f in json.loads(out)] == ["RAT-A1", "RAT-ZZ"]
    code, _, err = _run(["--db", str(db), "--animal", "RAT-Q0"])
    assert code == 1 and "no trials for animal 'RAT-Q0'" in err


def test_database_errors_are_one_line(tmp_path):
    code, _, err = _run(["--db", str(tmp_path / "missing.sqlite")])
    assert code == 1 and "no such database file" in err
    empty = tmp_path / "empty.sqlite"
    sqlite3.connect(empty).close()
    code, _, err = _run(["--db", str(empty)])
    assert code == 1 and "cannot read trials" in err and "\n" not in err.strip()
