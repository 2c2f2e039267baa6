"""The reference firmware on a simulated board (simavr): built once per test run, one fresh
board (a harness process and its pty) per test. Skipped, with one line saying why, where the
AVR toolchain or simavr is not installed."""

from __future__ import annotations

import itertools
from pathlib import Path

import pytest

from hardware_stubs.simulated_board import BoardError, SimulatedBoard, build, missing_parts

ROOT = Path(__file__).resolve().parents[2]
_serial = itertools.count(1)


@pytest.fixture(scope="session")
def board_build(tmp_path_factory):
    """(harness, firmware hex, the firmware build's size report)."""
    why = missing_parts()
    if why:
        pytest.skip(f"simulated board: {why}")
    try:
        return build(tmp_path_factory.mktemp("board-build"))
    except BoardError as exc:
        pytest.skip(f"simulated board: {exc}")


@pytest.fixture
def start_board(board_build, tmp_path):
    """Start boards (each at its own link path under tmp_path); all are closed afterwards."""
    harness, hex_file, _ = board_build
    boards: list[SimulatedBoard] = []

    def start(name: str | None = None) -> SimulatedBoard:
        board = SimulatedBoard(harness, hex_file, tmp_path / f"{name or 'board'}-{next(_serial)}.tty")
        boards.append(board)
        return board

    yield start
    for board in boards:
        board.close()


@pytest.fixture
def board(start_board) -> SimulatedBoard:
    return start_board()
