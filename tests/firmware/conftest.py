"""The firmware on simulated boards (simavr): each box's image built once per test run, one
fresh board (a harness process and its pty) per test. Skipped, with one line saying why,
where the AVR toolchain or simavr is not installed."""

from __future__ import annotations

import itertools
from pathlib import Path

import pytest

from hardware_stubs.simulated_board import BoardError, SimulatedBoard, build, missing_parts

ROOT = Path(__file__).resolve().parents[2]
_serial = itertools.count(1)


@pytest.fixture(scope="session")
def build_root(tmp_path_factory) -> Path:
    """One build folder for every box's image and the one harness they share."""
    why = missing_parts()
    if why:
        pytest.skip(f"simulated board: {why}")
    return tmp_path_factory.mktemp("board-build")


def _build(root: Path, box: str) -> tuple[Path, Path, str]:
    try:
        return build(root, box)
    except BoardError as exc:
        pytest.skip(f"simulated board: {exc}")


@pytest.fixture(scope="session")
def board_build(build_root):
    """The reference box: (harness, firmware hex, the firmware build's size report)."""
    return _build(build_root, "ref")


@pytest.fixture(scope="session")
def ports_build(build_root):
    """The five-port box (make BOX=ports): (harness, firmware hex, size report)."""
    return _build(build_root, "ports")


def _starter(built, tmp_path, box: str):
    harness, hex_file, _ = built
    boards: list[SimulatedBoard] = []

    def start(name: str | None = None) -> SimulatedBoard:
        link = tmp_path / f"{name or 'board'}-{next(_serial)}.tty"
        board = SimulatedBoard(harness, hex_file, link, box)
        boards.append(board)
        return board

    return start, boards


@pytest.fixture
def start_board(board_build, tmp_path):
    """Start reference boards (each at its own link path under tmp_path); all are closed afterwards."""
    start, boards = _starter(board_build, tmp_path, "ref")
    yield start
    for board in boards:
        board.close()


@pytest.fixture
def board(start_board) -> SimulatedBoard:
    return start_board()


@pytest.fixture
def ports_board(ports_build, tmp_path):
    """A simulated five-port board, closed afterwards."""
    start, boards = _starter(ports_build, tmp_path, "ports")
    yield start("five-port")
    for board in boards:
        board.close()
