"""Who may read the status page and who may act on a session.

Two secrets from the lab config: the viewer token (optional) gates reading, the operator
token gates pause, resume, stop and annotate. Tokens travel in the `X-Vigil-Token` header
or a form field, never in a URL (URLs end up in browser history, proxy logs and screen
shares), and are compared in constant time. A browser that logged in with a token holds a
cookie derived from it, not the token itself; the cookie grants reading only.
"""

from __future__ import annotations

import hashlib
import hmac
from urllib.parse import parse_qsl

from fastapi import Request

TOKEN_HEADER = "X-Vigil-Token"
TOKEN_FIELD = "token"
VIEW_COOKIE = "vigil_view"
MAX_FORM_BYTES = 16_384


class Refused(Exception):
    """A request turned away: 400 (token in the URL), 401 (no credentials), 403 (wrong)."""

    def __init__(self, status: int, message: str):
        super().__init__(message)
        self.status = status
        self.message = message


def same(supplied: str | None, expected: str | None) -> bool:
    """Constant-time comparison of a supplied token with the configured one."""
    if supplied is None or expected is None:
        return False
    return hmac.compare_digest(supplied.encode("utf-8"), expected.encode("utf-8"))


def refuse_token_in_url(request: Request) -> None:
    for key in request.query_params.keys():
        if "token" in key.lower():
            raise Refused(400, "a token in the url is refused; send it in the X-Vigil-Token header or a form field")


class Guard:
    def __init__(self, *, operator_token: str | None, viewer_token: str | None):
        self.operator_token = operator_token
        self.viewer_token = viewer_token
        self._cookie = None
        if viewer_token is not None:
            # Derived, so a stolen cookie does not reveal the token (and never acts).
            self._cookie = hmac.new(viewer_token.encode("utf-8"), b"vigil viewer cookie", hashlib.sha256).hexdigest()

    @property
    def read_is_open(self) -> bool:
        return self.viewer_token is None

    @property
    def cookie_value(self) -> str | None:
        return self._cookie

    def is_reader_token(self, token: str | None) -> bool:
        return same(token, self.viewer_token) or same(token, self.operator_token)

    def check_read(self, request: Request) -> None:
        if self.read_is_open:
            return
        token = request.headers.get(TOKEN_HEADER)
        if token is not None:
            if not self.is_reader_token(token):
                raise Refused(403, "wrong token")
            return
        cookie = request.cookies.get(VIEW_COOKIE)
        if cookie is not None:
            if not same(cookie, self._cookie):
                raise Refused(403, "this login is no longer valid; log in again")
            return
        raise Refused(401, "this page needs the viewer token")

    def check_operator(self, token: str | None) -> None:
        if self.operator_token is None:
            raise Refused(403, "controls are off: no operator token is configured")
        if token is None or token == "":
            raise Refused(401, "this action needs the operator token")
        if not same(token, self.operator_token):
            raise Refused(403, "wrong operator token")


async def form_fields(request: Request) -> dict[str, str]:
    """The fields of an urlencoded form body (what an HTML form posts); {} for other bodies.

    Parsed with the standard library: a form of a token, an action and a note needs no
    multipart support. The first value of a repeated field wins.
    """
    kind = request.headers.get("content-type", "")
    if not kind.startswith("application/x-www-form-urlencoded"):
        return {}
    body = await request.body()
    if len(body) > MAX_FORM_BYTES:
        raise Refused(413, "form too large")
    try:
        pairs = parse_qsl(body.decode("utf-8"), keep_blank_values=True, strict_parsing=False)
    except (UnicodeDecodeError, ValueError):
        raise Refused(400, "unreadable form") from None
    fields: dict[str, str] = {}
    for key, value in pairs:
        fields.setdefault(key, value)
    return fields


async def supplied_token(request: Request) -> str | None:
    """The token sent with a POST: the header first, else a form field."""
    token = request.headers.get(TOKEN_HEADER)
    if token is not None:
        return token
    return (await form_fields(request)).get(TOKEN_FIELD)
