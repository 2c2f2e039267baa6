"""`vigil` command line: check, run, demo, serve, rehearse, fit, export, doctor.

Exit codes: 0 success, 1 invalid input or a failed run, 2 usage error. Problems with
files are printed as `file:line:col: message`; a traceback never reaches the user.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import sys
from collections.abc import Sequence
from pathlib import Path

from server.protocol.problems import InvalidFile, Problem

REPO_ROOT = Path(__file__).resolve().parents[2]
DEMO_CONFIG = REPO_ROOT / "config.example.yaml"
DEMO_DB = "vigil-demo.sqlite"


def _err(message: str) -> None:
    sys.stderr.write(f"vigil: {message}\n")


# ---------------------------------------------------------------- check


def _problems(exc: InvalidFile) -> None:
    """Every problem of an invalid file, one `file:line:col: message` line each."""
    for problem in exc.problems:
        sys.stderr.write(f"{problem}\n")


def _warn(warnings: Sequence[Problem]) -> None:
    """Old spellings that were read, each naming the new one (they load until the next format version)."""
    for warning in warnings:
        mark = warning.mark
        sys.stderr.write(f"{mark.file}:{mark.line}:{mark.col}: warning: {warning.message}\n")


def cmd_check(args: argparse.Namespace) -> int:
    from server.lab.config import is_lab_config, load_lab
    from server.protocol.load import load_protocol

    bad = 0
    for file in args.files:
        try:
            if is_lab_config(file):
                lab = load_lab(file)
                said = f"lab '{lab.lab}': {len(lab.boxes)} boxes, {len(lab.alarms.channels)} alarm channels"
                warnings = lab.warnings
            else:
                protocol = load_protocol(file)
                said = f"'{protocol.name}': {len(protocol.trial_types)} trial types, {len(protocol.blocks)} blocks"
                warnings = protocol.warnings
        except InvalidFile as exc:
            bad += 1
            _problems(exc)
            continue
        _warn(warnings)
        if not args.quiet:
            print(f"{file}: ok ({said})")
    return 1 if bad else 0


# ---------------------------------------------------------------- run / demo


def _run_lab(config, db_path: str, minutes: float | None, port: int | None = None) -> int:
    from server.cli.reports import summary_table
    from server.lab.page_process import run_lab_with_page
    from server.lab.supervisor import Lab
    from server.store.dialect import is_server_url
    from server.store.errors import StoreError
    from server.store.lab_store import default_spool, open_lab_store
    from server.store.postgres import redact

    spool = None
    if is_server_url(db_path):
        spool = config.spool or default_spool(config.lab, Path(config.source).parent)
    try:
        store, forwarder = open_lab_store(db_path, rig=config.lab, spool=spool)
    except StoreError as exc:
        _err(str(exc))
        return 1
    if forwarder is not None:
        print(f"database: {redact(db_path)} (rig '{config.lab}', spool {Path(store.path).resolve()})")
    else:
        print(f"database: {Path(db_path).resolve()}")
    lab = Lab(config, store, forwarder=forwarder)
    try:
        # The page beside a lab reads the rig's own store: the spool, reachable whatever the server does.
        page_db = str(store.path)
        runs = asyncio.run(run_lab_with_page(lab, page_db, config.web, minutes=minutes, port=port))
    except Exception as exc:
        _err(f"run failed: {exc}")
        return 1
    finally:
        store.close()
    print()
    print(summary_table(runs))
    return 0 if all(run.ended is not None for run in runs) else 1


def cmd_run(args: argparse.Namespace) -> int:
    from server.lab.config import load_lab

    try:
        config = load_lab(args.config)
    except InvalidFile as exc:
        _problems(exc)
        return 1
    _warn(config.warnings)
    return _run_lab(config, args.db or str(config.database), args.minutes, args.port)


def cmd_demo(args: argparse.Namespace) -> int:
    from server.lab.demo import demo_lab

    try:
        config = demo_lab(DEMO_CONFIG, args.boxes)
    except InvalidFile as exc:
        _problems(exc)
        return 1
    minutes = args.minutes
    print(
        f"Vigil demo: {len(config.boxes)} emulated boxes with virtual animals"
        + (f", {minutes:g} min" if minutes else "; press Ctrl-C to stop")
    )
    return _run_lab(config, args.db, minutes, args.port)


def cmd_serve(args: argparse.Namespace) -> int:
    from server.web.launch import serve_store

    return serve_store(args.db, host=args.host, port=args.port)


# ---------------------------------------------------------------- rehearse


def cmd_stages(args: argparse.Namespace) -> int:
    from server.store.queries import open_readonly
    from server.store.stage_log import stage_history

    try:
        conn = open_readonly(args.db)
        history = stage_history(conn)
    except Exception as exc:  # a missing or foreign file is a user error, not a crash
        _err(f"cannot read {args.db}: {exc}")
        return 1
    if args.json:
        sys.stdout.write(json.dumps(history, sort_keys=True) + "\n")
        return 0
    if not history:
        print("no training stages recorded")
        return 0
    for row in history:
        line = f"{row['animal']:<12} stage {row['stage']:<3} {row['at'][:19]}  {row['reason']:<9} {row['protocol']}"
        sessions = row["evidence"].get("sessions") if row["evidence"] else None
        if sessions:
            figures = ", ".join(
                f"session {s['session']}: {s['trials']} trials"
                + (f", {s['accuracy']:.0%} correct" if s["accuracy"] is not None else "")
                for s in sessions
            )
            line += f"  ({figures})"
        print(line)
    return 0


def cmd_rehearse(args: argparse.Namespace) -> int:
    from hardware_stubs.agents import AGENTS
    from server.cli.reports import criterion_figure_svg, human_report, progress_bar
    from server.engine.caps import HardCaps
    from server.lab.population import load_population, parse_vary
    from server.lab.rehearsal import rehearse
    from server.protocol.load import load_protocol

    if args.agent is not None and args.agent not in AGENTS:
        _err(f"unknown agent '{args.agent}'; choose from {', '.join(sorted(AGENTS))}")
        return 2
    defaulted = None
    try:
        protocol = load_protocol(args.protocol)
        # a two-stage protocol is rehearsed by the two-stage learner unless told otherwise
        agent = args.agent or ("two_stage_learner" if protocol.two_stage is not None else "q_learner")
        if args.population:
            population = load_population(args.population, agent)
        else:
            vary = args.vary or list(AGENTS[agent].COHORT_VARY)  # nothing declared: the agent's cohort
            defaulted = None if args.vary or not vary else vary
            population = parse_vary(vary, agent)
    except InvalidFile as exc:
        _problems(exc)
        return 1
    _warn(protocol.warnings + population.warnings)
    if defaulted and not args.json:
        print(f"agent {agent}; drawn per animal: {', '.join(defaulted)} (--vary or --population to choose)")
    result = rehearse(
        protocol, args.animals, args.seed, caps=HardCaps(), progress=progress_bar(),
        workers=args.workers, sessions=args.sessions, population=population,
        firing_log=args.firings, choices=bool(args.choices),
    )  # fmt: skip
    if args.choices:
        from server.store.csv_exports import write_choice_csv

        try:
            with open(args.choices, "w", newline="", encoding="utf-8") as fh:
                write_choice_csv((p for animal in result["animals"] for p in animal.pop("choices")), fh)
        except OSError as exc:
            _err(f"cannot write choices {args.choices}: {exc.strerror}")
            return 1
    if args.figure:
        try:
            Path(args.figure).write_text(criterion_figure_svg(result), encoding="utf-8")
        except OSError as exc:
            _err(f"cannot write figure {args.figure}: {exc.strerror}")
            return 1
    if args.json:
        sys.stdout.write(json.dumps(result, sort_keys=True) + "\n")
    else:
        print(human_report(result))
        if args.figure:
            print(f"figure: {args.figure}")
    return 0


# ---------------------------------------------------------------- export


def cmd_export(args: argparse.Namespace) -> int:
    """One NWB file per session; one line per file written."""
    from server.export.nwb import export_nwb
    from server.store.errors import StoreError

    try:
        done = export_nwb(args.db, args.nwb, session_id=args.session, animal=args.animal)
    except StoreError as exc:
        _err(str(exc))
        return 1
    except OSError as exc:
        _err(f"cannot write to {args.nwb}: {exc.strerror or exc}")
        return 1
    for item in done:
        print(f"session {item.session_id}: {item.trials} trials, {item.events} events -> {item.path}")
    if not done:
        print("no sessions in the database; nothing written")
    return 0


# ---------------------------------------------------------------- doctor


def cmd_doctor(args: argparse.Namespace) -> int:
    """One line per finding about each box's serial port; 1 when any is a problem."""
    from server.link import doctor

    if args.config:
        from server.lab.config import load_lab

        try:
            config = load_lab(args.config)
        except InvalidFile as exc:
            _problems(exc)
            return 1
        if not any(box.port for box in config.boxes):
            print(f"{args.config}: no box has a `port:`; nothing to check")
            return 0
        findings = doctor.check_lab(config.boxes)
    else:
        ports = doctor.serial_ports()
        if not ports:
            print("no serial ports found (is a board plugged in?)")
            return 1
        findings = [f for port in ports for f in doctor.check_port(port, port)]
    for f in findings:
        print(f"{f.target}: {f.level}: {f.message}" + (f" -> {f.advice}" if f.advice else ""))
    bad = sum(f.level == "problem" for f in findings)
    print(f"{bad} problem(s)" if bad else "all good")
    return 1 if bad else 0


# ---------------------------------------------------------------- parser


def _number(cast, what: str, ok, expected: str):
    """An argparse type: `cast` the text, then accept it only when ok(value)."""

    def parse(text: str):
        try:
            value = cast(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected {what}, found '{text}'") from None
        if not ok(value):
            raise argparse.ArgumentTypeError(f"expected {expected}, found {text}")
        return value

    return parse


_positive_int = _number(int, "a whole number", lambda v: v >= 1, "at least 1")
_seed = _number(int, "a whole number", lambda v: v >= 0, "a seed of at least 0")
_minutes = _number(float, "minutes as a number", lambda v: v > 0, "a positive number of minutes")
_port = _number(int, "a port number", lambda v: 0 <= v <= 65535, "a port from 0 (any free port) to 65535")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="vigil", description="Closed-loop trial scheduler for operant conditioning boxes."
    )
    verbs = parser.add_subparsers(dest="verb", metavar="VERB")
    verbs.required = True

    p = verbs.add_parser("check", help="validate protocol files and lab configs")
    p.add_argument("files", nargs="+", metavar="FILE")
    p.add_argument("-q", "--quiet", action="store_true", help="print only problems")
    p.set_defaults(func=cmd_check)

    p = verbs.add_parser("run", help="run every box of a lab config")
    p.add_argument("config", metavar="CONFIG")
    p.add_argument(
        "--db", metavar="PATH|URL", help="SQLite database or postgresql:// URL (default: the config's `database`)"
    )
    p.add_argument("--minutes", type=_minutes, metavar="M", help="end sessions after M minutes")
    p.add_argument("--port", type=_port, metavar="P", help="status page port (default: the config's)")
    p.set_defaults(func=cmd_run)

    p = verbs.add_parser("demo", help="run emulated boxes with virtual animals")
    p.add_argument("--boxes", type=_positive_int, default=5, metavar="N")
    p.add_argument("--db", default=DEMO_DB, metavar="PATH")
    p.add_argument("--minutes", type=_minutes, metavar="M")
    p.add_argument("--port", type=_port, default=8642, metavar="P", help="status page port")
    p.set_defaults(func=cmd_demo)

    p = verbs.add_parser("serve", help="the status page over a database, read-only")
    p.add_argument(
        "--db", required=True, metavar="PATH|URL", help="SQLite database or postgresql:// URL (every rig's boxes)"
    )
    p.add_argument("--port", type=_port, default=8642, metavar="P")
    p.add_argument(
        "--host",
        default="127.0.0.1",
        metavar="H",
        help="address to listen on (beyond this computer needs VIGIL_VIEWER_TOKEN)",
    )
    p.set_defaults(func=cmd_serve)

    p = verbs.add_parser("stages", help="each animal's training-stage history")
    p.add_argument("--db", required=True, metavar="PATH")
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=cmd_stages)

    p = verbs.add_parser("rehearse", help="run a protocol over virtual animals in virtual time")
    p.add_argument("protocol", metavar="PROTOCOL")
    p.add_argument("--animals", type=_positive_int, default=10, metavar="N")
    p.add_argument("--seed", type=_seed, default=0, metavar="S")
    p.add_argument("--agent", default=None, metavar="NAME",
                   help="virtual animal (default: two_stage_learner for two-stage trials, else q_learner)")  # fmt: skip
    p.add_argument("--workers", type=_positive_int, default=None, metavar="W",
                   help="worker processes (default: all cores for large cohorts)")  # fmt: skip
    p.add_argument(
        "--sessions",
        type=_positive_int,
        default=1,
        metavar="K",
        help="sessions (days) per animal; learning carries over",
    )
    p.add_argument("--population", metavar="FILE", help="YAML: agent and how its traits vary")
    p.add_argument(
        "--vary",
        action="append",
        metavar="NAME=SPEC",
        help="vary a virtual animal's trait: NAME=LOW:HIGH, NAME=lognormal:MEDIAN:SIGMA, NAME=VALUE",
    )
    p.add_argument("--figure", metavar="FILE.svg", help="write a histogram of trials to criterion")
    p.add_argument("--choices", metavar="FILE.csv", help="write every virtual animal's trials for `vigil fit`")
    p.add_argument("--firings", action="store_true", help="list every rule firing with the values its condition read")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.set_defaults(func=cmd_rehearse)

    p = verbs.add_parser("export", help="write sessions as NWB files (one per session)")
    p.add_argument("--nwb", required=True, metavar="OUT_DIR", help="folder for the .nwb files (created if missing)")
    p.add_argument("--db", required=True, metavar="PATH", help="SQLite database to read")
    which = p.add_mutually_exclusive_group()
    which.add_argument("--session", type=_positive_int, metavar="ID", help="only this session")
    which.add_argument("--animal", metavar="ID", help="every session of this animal")
    p.set_defaults(func=cmd_export)

    p = verbs.add_parser("doctor", help="check the serial ports and boards of a lab config")
    p.add_argument("config", nargs="?", metavar="CONFIG", help="lab config (default: every serial port found)")
    p.set_defaults(func=cmd_doctor)

    from server.cli import fit as fit_cli

    p = verbs.add_parser("fit", help="fit learning models to recorded choices")
    fit_cli.add_arguments(p)
    p.set_defaults(func=fit_cli.run)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.func(args)
    except KeyboardInterrupt:
        _err("interrupted")
        return 130
    except BrokenPipeError:
        return 0
