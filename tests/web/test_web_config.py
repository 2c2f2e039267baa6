"""The lab config's `web` mapping: defaults, tokens, and the refusal to listen on the LAN
without them; errors name file:line:col like every config error."""

from __future__ import annotations

import pytest
from web_samples import REPO

from server.lab.config import load_lab
from server.lab.config_web import WebSettings, is_loopback
from server.protocol.problems import InvalidFile


def write(tmp_path, web: str):
    path = tmp_path / "lab.yaml"
    path.write_text(
        f"""lab: Room 9
boxes:
  - name: b1
    animal: A-1
    protocol: {REPO / "protocols" / "reversal.yaml"}
    emulate: {{agent: random}}
{web}""",
        encoding="utf-8",
    )
    return path


def problems(path) -> list[str]:
    with pytest.raises(InvalidFile) as caught:
        load_lab(path)
    return [str(p) for p in caught.value.problems]


def test_defaults_listen_on_this_computer_only(tmp_path):
    assert load_lab(write(tmp_path, "")).web == WebSettings()
    assert WebSettings().host == "127.0.0.1"


def test_web_mapping_is_read(tmp_path):
    web = load_lab(
        write(
            tmp_path,
            """web:
  host: 0.0.0.0
  port: 9001
  operator_token: a-long-operator-secret
  viewer_token: a-long-viewer-secret
  no_response_minutes: 2.5
""",
        )
    ).web
    assert web == WebSettings("0.0.0.0", 9001, "a-long-operator-secret", "a-long-viewer-secret", 2.5)


def test_the_lan_without_tokens_is_refused(tmp_path):
    path = write(tmp_path, "web:\n  host: 192.168.10.4\n  operator_token: a-long-operator-secret\n")
    found = problems(path)
    assert len(found) == 1
    assert found[0].startswith(f"{path}:8:9: web.host: listening on '192.168.10.4'")
    assert "web.viewer_token" in found[0]


def test_bad_values_are_all_reported(tmp_path):
    path = write(tmp_path, "web:\n  port: 70000\n  operator_token: short\n  viewr_token: x\n")
    found = problems(path)
    assert any(":8:9: web.port: expected" in p for p in found)
    assert any(":9:19: web.operator_token: expected at least 16 characters, found 5" in p for p in found)
    assert any("viewr_token" in p and "viewer_token" in p for p in found)  # did-you-mean


def test_loopback_addresses():
    for host in ("127.0.0.1", "127.4.5.6", "::1", "localhost"):
        assert is_loopback(host), host
    for host in ("0.0.0.0", "192.168.1.2", "::", "lab-pc.local"):
        assert not is_loopback(host), host
