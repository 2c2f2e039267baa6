"""The estimator as the lab runs it: every choice trial stored with its estimate, the stored
estimates rebuilt bit for bit by replaying the stored trials, and the next session of the
same animal starting from that posterior."""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
import textwrap
from pathlib import Path

from server.lab.assembly import choice_trial_types, estimator_config
from server.models.estimator import OnlineEstimator
from server.protocol.load import load_protocol

ROOT = Path(__file__).resolve().parents[2]


def test_stored_estimates_replay_bit_for_bit_across_two_days(tmp_path):
    config = tmp_path / "lab.yaml"
    config.write_text(
        textwrap.dedent(f"""\
        lab: estimator test
        database: lab.sqlite
        boxes:
          - name: bench-2
            animal: T-12
            protocol: {ROOT / "protocols" / "reversal.yaml"}
            emulate: {{agent: q_learner, seed: 9, traits: {{latency_s: 0.5}}}}
        """)
    )
    for _ in range(2):
        result = subprocess.run([sys.executable, "-m", "server.cli", "run", str(config), "--minutes", "0.3"],
                                capture_output=True, text=True, cwd=ROOT, timeout=120)  # fmt: skip
        assert result.returncode == 0, result.stdout + result.stderr
    conn = sqlite3.connect(tmp_path / "lab.sqlite")
    protocol = load_protocol(ROOT / "protocols" / "reversal.yaml")
    types = choice_trial_types(protocol)
    trials = conn.execute(
        "SELECT session_id, trial, choice, reward, trial_type, interrupted FROM trials ORDER BY session_id, trial"
    ).fetchall()
    fed = [
        (sid, trial, choice, reward) for sid, trial, choice, reward, kind, cut in trials if kind in types and not cut
    ]
    stored = {
        (sid, trial): json.loads(data)
        for sid, trial, data in conn.execute("SELECT session_id, trial, data FROM estimates")
    }
    assert len({sid for sid, *_ in fed}) == 2, "both days produced choice trials"
    assert set(stored) == {(sid, trial) for sid, trial, _, _ in fed}, "every choice trial has its estimate"

    _, replayed = OnlineEstimator.replay([(sid, c, r) for sid, _, c, r in fed], **estimator_config(protocol))
    for (sid, trial, _, _), estimate in zip(fed, replayed):
        assert json.loads(json.dumps(estimate.to_dict())) == stored[(sid, trial)], (sid, trial)
    # day 2 continued from day 1's posterior: its first estimate is not the prior's
    first = next(row for row in fed if row[0] == fed[-1][0])
    fresh = OnlineEstimator(**estimator_config(protocol)).update(first[2], first[3]).to_dict()
    assert stored[(first[0], first[1])]["params"] != fresh["params"]
