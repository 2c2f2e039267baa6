"""The lab config's `alarms` section: what it accepts, and `vigil check` refusing a secret
written in the file."""

from __future__ import annotations

import asyncio
from pathlib import Path

import pytest

from server.cli import main
from server.lab.config import load_lab
from server.lab.config_alarms import EmailTo, QuietHours, WebhookTo, channel_secrets
from server.lab.supervisor import Lab, LabError
from server.protocol.problems import InvalidFile
from server.store.writer import Store

REPO = Path(__file__).resolve().parents[2]


def lab_file(tmp_path: Path, alarms: str) -> Path:
    path = tmp_path / "lab.yaml"
    path.write_text(
        f"""\
lab: Rig room 3
boxes:
  - name: rig-3a
    animal: RV-0301
    protocol: {REPO / "protocols" / "reversal.yaml"}
    emulate: {{agent: random, seed: 31}}
{alarms}""",
        encoding="utf-8",
    )
    return path


GOOD = """\
alarms:
  repeat_minutes: 20
  disk_free_mb: 800
  send:
    - email:
        relay: smtp.rig3.example
        sender: vigil@rig3.example
        to: [pi@rig3.example, tech@rig3.example]
        user: vigil
        password_env: RIG3_SMTP_PASSWORD
      kinds: [link_lost, no_response, store_unreachable, disk_nearly_full]
      quiet_hours: "23:00-06:30"
    - webhook: {url_env: RIG3_CHAT_HOOK}
      kinds: all
"""


def test_a_full_alarms_section_reads_into_settings(tmp_path):
    alarms = load_lab(lab_file(tmp_path, GOOD)).alarms
    assert alarms.repeat_minutes == 20 and alarms.disk_free_mb == 800 and alarms.no_response_minutes is None
    mail, hook = alarms.channels
    assert mail.to == EmailTo("smtp.rig3.example", 587, "starttls", "vigil@rig3.example",
                              ("pi@rig3.example", "tech@rig3.example"), "vigil", "RIG3_SMTP_PASSWORD")  # fmt: skip
    assert mail.quiet == QuietHours(23 * 60, 6 * 60 + 30) and hook.quiet is None  # quiet hours off by default
    assert hook.to == WebhookTo(None, "RIG3_CHAT_HOOK") and len(hook.kinds) == 7
    assert channel_secrets(hook, {"RIG3_CHAT_HOOK": "https://chat.rig3.example/h/abc"}) == {
        "url": "https://chat.rig3.example/h/abc"
    }


def test_vigil_check_refuses_a_plain_text_secret_at_its_place(tmp_path, capsys):
    bad = GOOD.replace("password_env: RIG3_SMTP_PASSWORD", "password: wheel-of-cheese-42").replace(
        "{url_env: RIG3_CHAT_HOOK}", "{url: 'https://chat.rig3.example/h', token: abc123}"
    )
    path = lab_file(tmp_path, bad)
    assert main(["check", str(path)]) == 1
    err = capsys.readouterr().err.splitlines()
    assert err == [
        f"{path}:16:9: alarms.send[1].email.password: secrets are not read from the lab config; "
        "put it in an environment variable and name that variable with 'password_env'",
        f"{path}:19:53: alarms.send[2].webhook.token: secrets are not read from the lab config; "
        "put it in an environment variable and name that variable with 'token_env'",
    ]
    assert "wheel-of-cheese" not in "\n".join(err)


def test_vigil_check_takes_a_good_lab_config(tmp_path, capsys):
    assert main(["check", str(lab_file(tmp_path, GOOD))]) == 0
    assert "lab 'Rig room 3': 1 boxes, 2 alarm channels" in capsys.readouterr().out


@pytest.mark.parametrize(
    "alarms, message",
    [
        ("alarms: {send: [{webhook: {url: 'ftp://x'}, kinds: all}]}", "expected an http:// or https:// URL"),
        ("alarms: {send: [{webhook: {url: 'https://u:pw@x/h'}, kinds: all}]}", "holds a password"),
        ("alarms: {send: [{webhook: {url: 'https://x/h'}, kinds: [link_lots]}]}", "did you mean 'link_lost'?"),
        ("alarms: {send: [{webhook: {url: 'https://x/h'}, kinds: all, quiet_hours: '7-9'}]}", "such as '22:00-07:00'"),
        ("alarms: {send: [{kinds: all}]}", "give exactly one of 'email' or 'webhook'"),
        ("alarms: {send: [{webhook: {url_env: 'my hook'}, kinds: all}]}", "expected the name of an environment"),
        ("alarms: {send: [{email: {relay: r, sender: nobody, to: a@b}, kinds: all}]}", "expected an e-mail address"),
        ("alarms: {disk_free_mb: -1}", "alarms.disk_free_mb: expected"),
    ],
)
def test_bad_alarm_settings_are_one_line_errors(tmp_path, alarms, message):
    with pytest.raises(InvalidFile) as caught:
        load_lab(lab_file(tmp_path, alarms + "\n"))
    assert any(message in str(p) for p in caught.value.problems), caught.value.problems


def test_a_missing_environment_variable_stops_the_run_before_any_session(tmp_path, monkeypatch):
    monkeypatch.delenv("RIG3_SMTP_PASSWORD", raising=False)
    monkeypatch.setenv("RIG3_CHAT_HOOK", "https://chat.rig3.example/h/abc")
    store = Store.open(tmp_path / "rig3.sqlite")
    lab = Lab(load_lab(lab_file(tmp_path, GOOD)), store, say=lambda s: None, in_process_boxes=True)
    with pytest.raises(LabError, match=r"alarms.send\[1\] \(e-mail via smtp.rig3.example:587\): environment "
                                       r"variable RIG3_SMTP_PASSWORD is not set"):  # fmt: skip
        asyncio.run(lab.run(minutes=0.01))
    assert lab.runs == []
    assert store.conn.execute("SELECT count(*) FROM sessions").fetchone()[0] == 0
    store.close()
