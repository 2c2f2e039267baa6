"""Who may read and act: tokens, tokens in URLs, read-only serving, inert names."""

from __future__ import annotations

import html
from html.parser import HTMLParser
from urllib.parse import quote

from web_samples import EVIL_ANIMAL, EVIL_BOX, OPERATOR, VIEWER, TestClient

from server.web import create_app
from server.web.auth import same


def test_viewer_token_gates_reading(guarded):
    assert guarded.get("/api/boxes").status_code == 401
    page = guarded.get("/")
    assert page.status_code == 401 and 'action="/login"' in page.text
    assert guarded.get("/api/boxes", headers={"X-Vigil-Token": "not-the-token"}).status_code == 403
    assert guarded.get("/api/boxes", headers={"X-Vigil-Token": VIEWER}).status_code == 200
    # what a login page needs stays open
    assert guarded.get("/assets/vigil.css").status_code == 200
    assert guarded.get("/login").status_code == 200


def test_login_gives_a_reading_cookie_that_is_not_the_token(guarded):
    refused = guarded.post("/login", data={"token": "guess"}, follow_redirects=False)
    assert refused.status_code == 403 and "vigil_view" not in refused.cookies
    done = guarded.post("/login", data={"token": VIEWER}, follow_redirects=False)
    assert done.status_code == 303
    cookie = done.cookies["vigil_view"]
    assert VIEWER not in cookie
    assert "httponly" in done.headers["set-cookie"].lower()
    assert "samesite=strict" in done.headers["set-cookie"].lower()
    assert guarded.get("/").status_code == 200  # the client keeps the cookie
    guarded.cookies.set("vigil_view", "0" * 64)
    assert guarded.get("/").status_code == 403


def test_a_token_in_the_url_is_refused(guarded, read_only):
    for url in (
        "/api/boxes?token=" + VIEWER,
        "/?X-Vigil-Token=" + VIEWER,
        "/api/sessions/1/trials?after=2&viewer_token=x",
    ):
        response = guarded.get(url, headers={"X-Vigil-Token": VIEWER})
        assert response.status_code == 400, url
    assert read_only.get("/api/boxes?TOKEN=1").status_code == 400
    assert read_only.post("/login?token=x").status_code == 400
    # other query parameters are fine
    assert guarded.get("/api/sessions/1/trials?after=2", headers={"X-Vigil-Token": VIEWER}).status_code == 200


def test_read_only_serve_exposes_no_control(read_only, lab_db):
    sid = lab_db["second"]
    for path in (
        f"/api/sessions/{sid}/stop",
        f"/api/sessions/{sid}/pause",
        f"/api/sessions/{sid}/annotations",
        f"/sessions/{sid}/control",
    ):
        response = read_only.post(path, headers={"X-Vigil-Token": OPERATOR}, data={"token": OPERATOR, "action": "stop"})
        assert response.status_code in (404, 405), path
    schema = read_only.get("/api/openapi.json").json()
    assert not any("post" in ops for ops in schema["paths"].values())
    assert 'data-act="stop"' not in read_only.get("/").text
    assert 'id="optoken"' not in read_only.get("/").text
    # and even with an operator token configured, no lab means no controls
    app = create_app(lab_db["path"], operator_token=OPERATOR)
    with TestClient(app) as client:
        assert client.post(f"/api/sessions/{sid}/stop", headers={"X-Vigil-Token": OPERATOR}).status_code in (404, 405)


def _pages(client, lab_db):
    evil = lab_db["evil"]
    return {
        "overview": client.get("/").text,
        "session": client.get(f"/sessions/{evil}").text,
        "animal": client.get("/animals/" + quote(EVIL_ANIMAL, safe="")).text,
        "sessions": client.get("/sessions").text,
        "panels": client.get(f"/sessions/{evil}/panels").text,
    }


class _Elements(HTMLParser):
    """Every start tag with its attributes, as a browser's tokenizer sees them (stdlib
    html.parser, the outside reference here)."""

    def __init__(self):
        super().__init__()
        self.tags: list[tuple[str, dict]] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))


def test_names_carrying_markup_render_inert(read_only, lab_db):
    for name, text in _pages(read_only, lab_db).items():
        assert EVIL_BOX not in text and EVIL_ANIMAL not in text, name
        parsed = _Elements()
        parsed.feed(text)
        tags = [tag for tag, _ in parsed.tags]
        assert "img" not in tags, name
        handlers = [(tag, key) for tag, attrs in parsed.tags for key in attrs if key.startswith("on")]
        assert handlers == [], name
        # the only script element on a page is our own vendored file
        scripts = [attrs.get("src", "") for tag, attrs in parsed.tags if tag == "script"]
        assert len(scripts) == (0 if name == "panels" else 1), name
        assert all(src.startswith("/assets/vigil.js") for src in scripts), name
    pages = _pages(read_only, lab_db)
    assert html.escape(EVIL_BOX) in pages["overview"]
    assert html.escape(EVIL_ANIMAL) in pages["session"]
    assert quote(EVIL_ANIMAL, safe="") in pages["overview"]  # the animal link is encoded
    # the JSON keeps the names exactly as stored; the page script sets them as text only
    names = {t["box"] for t in read_only.get("/api/boxes").json()}
    assert EVIL_BOX in names


def test_every_response_carries_a_strict_content_policy(read_only):
    for url in ("/", "/api/boxes", "/nowhere"):
        policy = read_only.get(url).headers["content-security-policy"]
        assert "script-src 'self'" in policy and "frame-ancestors 'none'" in policy
    assert read_only.get("/").headers["x-content-type-options"] == "nosniff"


def test_token_comparison():
    assert same("abc", "abc")
    assert not same("abc", "abd")
    assert not same(None, "abc") and not same("abc", None)
    assert not same("", "abc")
