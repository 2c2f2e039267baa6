"""The status page: live overview, session and animal pages, JSON API, operator controls."""

from server.web.app import create_app
from server.web.serving import StatusServer, WebError, bind_socket, serve

__all__ = ["create_app", "serve", "StatusServer", "WebError", "bind_socket"]
