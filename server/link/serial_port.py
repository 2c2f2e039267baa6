"""One open serial port on the asyncio loop: bytes in through a callback, bytes out without
blocking, any failure reported once. Every port is opened with `serial.serial_for_url`, so a
device path, a pty and a pyserial URL take the same path (DESIGN.md)."""

from __future__ import annotations

import asyncio
import os
import threading
from collections.abc import Callable
from typing import Any

import serial

PORT_ERRORS = (serial.SerialException, OSError, ValueError)


def reason_of(exc: BaseException) -> str:
    """A short lower-case reason for a port error."""
    text = getattr(exc, "strerror", None) or str(exc) or type(exc).__name__
    return text[:1].lower() + text[1:]


class SerialPort:
    """Opens `url` at once (raising a PORT_ERRORS exception when it cannot).

    A plain port is read with `loop.add_reader` on its descriptor and written with os.write,
    the fastest path measured here (DESIGN.md); other pyserial handlers (spy://, socket://)
    keep their own read and write, and one with no descriptor at all is read by a thread.
    """

    def __init__(
        self,
        url: str,
        baudrate: int,
        on_data: Callable[[bytes], None],
        on_fail: Callable[[str], None],
    ) -> None:
        exclusive = {"exclusive": True} if "://" not in url else {}
        self._port: Any = serial.serial_for_url(url, baudrate=baudrate, timeout=0, **exclusive)
        self._on_data, self._on_fail = on_data, on_fail
        self._raw = type(self._port) is serial.Serial
        self._loop = asyncio.get_running_loop()
        self._unsent = b""
        self.open = True
        try:
            self._fd: int | None = self._port.fileno()
        except (AttributeError, OSError, ValueError, serial.SerialException):
            self._fd = None
        if self._fd is not None:
            self._loop.add_reader(self._fd, self._readable)
        else:
            self._port.timeout = 0.05
            threading.Thread(target=self._read_thread, daemon=True).start()

    def _readable(self) -> None:
        assert self._fd is not None  # only a port with a descriptor is read here
        try:
            if self._raw:
                data = os.read(self._fd, 65536)
            else:
                data = self._port.read(max(1, self._port.in_waiting))
                if not data:
                    return  # the descriptor woke for the handler's own traffic
        except BlockingIOError:
            return
        except OSError as exc:
            self._on_fail(f"port error: {reason_of(exc)}")
            return
        if not data:
            self._on_fail("port closed: the device is gone")
            return
        self._on_data(data)

    def _read_thread(self) -> None:
        port = self._port
        while self.open:
            try:
                data = port.read(max(1, port.in_waiting))
            except Exception as exc:  # any failure of a foreign handler means a lost port
                if self.open:
                    self._loop.call_soon_threadsafe(self._on_fail, f"port error: {reason_of(exc)}")
                return
            if data and self.open:
                self._loop.call_soon_threadsafe(self._on_data, data)

    def write(self, data: bytes) -> None:
        """Send now; what the line discipline cannot take yet goes when it drains."""
        data = self._unsent + data
        self._unsent = b""
        if not data or not self.open:
            return
        try:
            if not self._raw or self._fd is None:
                self._port.write(data)
                return
            written = os.write(self._fd, data)
        except BlockingIOError:
            written = 0
        except PORT_ERRORS as exc:
            self._on_fail(f"port error: {reason_of(exc)}")
            return
        if written < len(data):
            self._unsent = data[written:]
            assert self._fd is not None  # BlockingIOError comes from os.write on the descriptor
            self._loop.add_writer(self._fd, self._writable)

    def _writable(self) -> None:
        if self._fd is not None:
            self._loop.remove_writer(self._fd)
        self.write(b"")

    def close(self) -> None:
        if not self.open:
            return
        self.open = False
        if self._fd is not None:
            self._loop.remove_reader(self._fd)
            self._loop.remove_writer(self._fd)
        try:
            self._port.close()
        except PORT_ERRORS:
            pass
