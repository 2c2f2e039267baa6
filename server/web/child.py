"""The status page's own process: uvicorn serving the app, fed by the lab over a channel.

Why a process: each page request costs ~0.5-1 ms of Python, and served on the lab's loop
every one of them delayed the boxes' inputs (bench/web.py measured the closed loop's p99
0.5-1 ms worse under 20 polling browsers); a thread would not help, as the GIL changes hands
only every 5 ms. In its own process the page is as busy as its clients make it while the
boxes' loop runs no request code at all.

Why `python -m server.web.child` through subprocess rather than multiprocessing: the child
needs exactly two file descriptors of the lab's, the listening socket (bound by the lab, so
a busy port is a one-line warning before anything starts) and its end of the channel;
`pass_fds` hands over those and nothing else (not the database, not the boxes' ptys). A
spawned multiprocessing child would re-import the caller's `__main__` (the `vigil` script,
a bench) and pickle its arguments. Tokens arrive over the channel, never in argv, which
`ps` shows to every user.

Lifecycle: the child ignores SIGINT (a terminal's Ctrl-C reaches the whole process group;
the lab ends its sessions cleanly, then closes the channel), exits when the channel reads
EOF, which the kernel delivers however the lab ends (SIGKILL included), and runs at a lower
priority so that on a busy machine the kernel favours the boxes' process.

    python -m server.web.child --listen-fd N --channel-fd M
"""

from __future__ import annotations

import argparse
import asyncio
import os
import signal
import socket
import sys
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # imported when serving starts: the child ignores SIGINT before anything slow
    from server.web.page_end import LabView
    from server.web.serving import StatusServer

PAGE_NICENESS = 5


async def serve_page(listen_fd: int, channel_fd: int) -> int:
    from server.lab.page_channel import ChannelError, decode
    from server.lab.signals import on_stop_signals
    from server.store.errors import StoreError
    from server.web.app import create_app
    from server.web.page_end import open_lab_view
    from server.web.serving import StatusServer

    listening = socket.socket(fileno=listen_fd)
    view = await open_lab_view(socket.socket(fileno=channel_fd))
    line = await view.reader.readline()
    if not line:
        return 0  # the lab ended before the page began
    try:
        setup = decode(line)["setup"]
        app = create_app(
            setup["db"],
            live=view,
            operator_token=setup["operator_token"],
            viewer_token=setup["viewer_token"],
            lab_name=setup["lab_name"],
            quiet_after_s=setup["quiet_after_s"],
        )
    except (ChannelError, KeyError, TypeError) as exc:
        print(f"vigil: status page: bad setup from the lab: {exc!r}", file=sys.stderr)
        return 1
    except StoreError as exc:
        print(f"vigil: status page: {exc}", file=sys.stderr)
        return 1
    server = StatusServer(app, setup["host"], 0, sock=listening)
    with on_stop_signals(asyncio.get_running_loop(), lambda sig: server.stop(), (signal.SIGTERM,)):
        return await _serve(server, view)


async def _serve(server: StatusServer, view: LabView) -> int:
    fed = asyncio.create_task(view.run())
    serving = asyncio.create_task(server.serve())
    while not server.started and not serving.done():
        await asyncio.sleep(0.01)
    if server.started:
        view.tell_ready(os.getpid())
    await asyncio.wait({fed, serving}, return_when=asyncio.FIRST_COMPLETED)
    server.stop()  # the lab has gone (EOF), or uvicorn stopped: either way, stop listening
    results = await asyncio.gather(serving, return_exceptions=True)
    fed.cancel()
    await asyncio.gather(fed, return_exceptions=True)
    if isinstance(results[0], BaseException):
        print(f"vigil: status page failed: {results[0]!r}", file=sys.stderr)
        return 1
    return 0


def main(argv: list[str] | None = None) -> int:
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # before anything slow: Ctrl-C is the lab's
    parser = argparse.ArgumentParser(description="the status page's process (started by the lab)")
    parser.add_argument("--listen-fd", type=int, required=True)
    parser.add_argument("--channel-fd", type=int, required=True)
    args = parser.parse_args(argv)
    try:
        os.nice(PAGE_NICENESS)
    except OSError:
        pass
    return asyncio.run(serve_page(args.listen_fd, args.channel_fd))


if __name__ == "__main__":
    sys.exit(main())
