"""The status page's listening socket, bound by whoever starts the page: the lab (before
the page's process exists, so a busy port is one warning and the URL can be printed at
once) or `vigil serve`."""

from __future__ import annotations

import errno
import socket


class WebError(Exception):
    pass


def bind_socket(host: str, port: int) -> socket.socket:
    """A listening TCP socket on host:port (port 0 picks a free one), so the URL can be
    printed, and used, before the server's loop gets to it."""
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    # proto given explicitly: asyncio only sets TCP_NODELAY on accepted sockets whose proto
    # is IPPROTO_TCP, and without it small responses wait ~40 ms on delayed ACKs.
    sock = socket.socket(family, socket.SOCK_STREAM, socket.IPPROTO_TCP)
    try:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        sock.bind((host, port))
        sock.listen(128)  # connections wait in the backlog until uvicorn starts accepting
    except OSError as exc:
        sock.close()
        why = "the port is already in use" if exc.errno == errno.EADDRINUSE else (exc.strerror or str(exc)).lower()
        raise WebError(f"cannot listen on {host}:{port}: {why}") from None
    return sock


def url_of(host: str, port: int) -> str:
    return f"http://[{host}]:{port}/" if ":" in host else f"http://{host}:{port}/"
