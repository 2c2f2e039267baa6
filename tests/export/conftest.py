"""Fixtures for the export tests: a database of invented sessions run closed loop in virtual
time (the status page tests' recorder), two of one animal, one as an older database keeps it."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "web"))  # web_samples: the shared recorder

from nwb_samples import SUBJECT  # noqa: E402
from web_samples import AUTOSHAPING, REVERSAL, record_session  # noqa: E402

from server.store.writer import Store  # noqa: E402


@pytest.fixture(scope="module")
def stored_lab(tmp_path_factory):
    """RN-0501: two reversal nights with estimates and subject keys; RN-0502: an autoshaping
    session stored without subject keys (a database from before they existed)."""
    path = tmp_path_factory.mktemp("export") / "lab.sqlite"
    with Store.open(path) as store:
        first = record_session(
            store, box="rack-1", animal="RN-0501", protocol_path=REVERSAL, agent="q_learner", seed=11,
            estimates=True, alpha=0.3, beta=5.0, started_at="2031-05-11T09:00:00.000+02:00", subject=SUBJECT,
        )  # fmt: skip
        second = record_session(
            store, box="rack-1", animal="RN-0501", protocol_path=REVERSAL, agent="q_learner", seed=12,
            estimates=True, alpha=0.3, beta=5.0, started_at="2031-05-12T09:05:00.000+02:00", subject=SUBJECT,
        )  # fmt: skip
        pav = record_session(
            store, box="rack-2", animal="RN-0502", protocol_path=AUTOSHAPING, agent="pavlovian", seed=13,
            tracking="sign",
        )  # fmt: skip
        store.write_annotation(first, "bedding changed before the session", "tech 3", t=12.5)
        store.write_annotation(first, "looked sleepy", "tech 3", wall_time="2031-05-11T09:10:00.000+02:00")
    return {"path": path, "first": first, "second": second, "pav": pav}


@pytest.fixture(scope="module")
def exported(stored_lab, tmp_path_factory):
    """Every session of the stored lab exported once (`vigil export` with neither --session nor
    --animal), each file validated and read back against the database (nwb_checks.check_file)."""
    from nwb_checks import check_file

    from server.cli import main

    out = tmp_path_factory.mktemp("nwb")
    assert main(["export", "--nwb", str(out), "--db", str(stored_lab["path"])]) == 0
    files = {int(p.stem.rsplit("-", 1)[1]): p for p in out.glob("*.nwb")}
    assert sorted(files) == sorted((stored_lab["first"], stored_lab["second"], stored_lab["pav"]))
    return {sid: check_file(stored_lab["path"], path, sid) | {"path": path} for sid, path in files.items()}
