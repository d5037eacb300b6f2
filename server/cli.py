"""Command line: ``stationfit adjust FILE``, ``stationfit import FILE`` and ``stationfit serve``
(also ``python -m server``).

Exit statuses follow the result contract: 0 adjusted (tests pass or not),
2 field book errors, 3 network cannot be adjusted; 64 for a command line that
cannot be followed (unknown option, unreadable file) and 73 for a data folder
``serve`` cannot use (the sysexits numbers).  Errors go to stderr as plain
sentences, never as a traceback.
"""

from __future__ import annotations

import argparse
import gc
import os
import sys
from pathlib import Path
from typing import NoReturn, TextIO

from server import __version__
from server.errors import FieldbookError, NetworkError
from server.results.json_writer import write_json

EXIT_OK, EXIT_FIELDBOOK, EXIT_NETWORK, EXIT_USAGE = 0, 2, 3, 64
#: ``serve`` cannot open or create its data folder (sysexits' EX_CANTCREAT).
EXIT_DATA = 73
#: ``serve`` would be reachable by others without accounts (sysexits' EX_CONFIG).
EXIT_CONFIG = 78


EXIT_STATUSES = """exit statuses:
  0   adjusted (whether or not its statistical tests pass)
  2   the field book has errors: each on stderr as FILE:LINE: message
      (import: the errors of the XML or CSV file, the same way)
  3   the network cannot be adjusted: what is wrong, naming the points
  64  the command line cannot be followed (unknown option, unreadable file;
      users: a name, role or password refused)
  73  serve, users: the data folder cannot be created or written
  78  serve: others could reach the service and it has no accounts"""


class _Parser(argparse.ArgumentParser):
    """argparse, but a wrong command line exits 64 so that 2 always means field book errors."""

    def error(self, message: str) -> NoReturn:
        self.print_usage(sys.stderr)
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message}\n")


#: Commands that run once and end; ``run`` leaves them without tearing the interpreter down.
_ONE_SHOT = frozenset({"adjust", "import", "plan", "monitor"})


def run() -> NoReturn:
    """The ``stationfit`` command and ``python -m server``: ``main``, then exit.

    A one-shot command's objects (millions of them for a network of a million marks) are
    not freed one by one on the way out: the operating system takes the memory back whole.
    Measured on leveling 100,000 marks: 0.07-0.13 s of the command. Output is flushed
    first; files a command writes are closed before it returns. ``serve``, ``worker`` and
    ``users`` end the ordinary way, so that their exit handlers run.
    """
    one_shot = sys.argv[1:2] and sys.argv[1] in _ONE_SHOT
    if one_shot:
        # nothing it makes outlives it: the cyclic collector would only walk the modules
        # being imported (about 90 collections, 0.03 s) and the objects of the result
        gc.disable()
    status = main()
    if one_shot:
        try:
            sys.stdout.flush()
            sys.stderr.flush()
        except OSError:  # a reader that went away (a closed pipe): Python's own status
            status = 120
        os._exit(status)
    raise SystemExit(status)


def main(argv: list[str] | None = None) -> int:
    """Run the command line; returns the exit status."""
    parser = _Parser(
        prog="stationfit",
        epilog=EXIT_STATUSES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Least-squares adjustment of survey control networks. The results must be "
        "reviewed and certified by a licensed surveyor; local codes and standards govern.",
    )
    parser.add_argument("--version", action="version", version=f"%(prog)s {__version__}")
    commands = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)
    adjust = commands.add_parser(
        "adjust",
        help="adjust a field book",
        epilog=EXIT_STATUSES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Adjust FILE and print the result (text, or --json for the JSON result).",
    )
    adjust.add_argument("file", type=Path)
    adjust.add_argument("--json", action="store_true", help="print the JSON result alone on stdout")
    adjust.add_argument("--report", type=Path, metavar="FILE.html", help="write the HTML report")
    adjust.add_argument("--pdf", type=Path, metavar="FILE.pdf", help="write the PDF report")
    adjust.add_argument(
        "--csv", type=Path, metavar="FILE.csv", help="write the adjusted points as CSV"
    )
    _limit_options(adjust, "(default: no limit)", "(default: no limit)")
    serve = commands.add_parser(
        "serve",
        help="start the web service",
        epilog=EXIT_STATUSES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Start the web service: upload field books, review, re-run, download reports.",
    )
    serve.add_argument("--host", default="127.0.0.1")
    serve.add_argument("--port", type=int, default=8000)
    serve.add_argument("--data", type=Path, default=None, help="where projects are stored")
    serve.add_argument(
        "--database",
        default=None,
        metavar="postgresql://…",
        help="keep the projects in this PostgreSQL database instead of the data folder "
        "(default: $STATIONFIT_DATABASE); adjustments then go to `worker` processes",
    )
    _limit_options(
        serve,
        "(default: $STATIONFIT_MAX_OBSERVATIONS, else 200000; 0: no limit)",
        "(default: $STATIONFIT_MAX_UNKNOWNS, else 100000; 0: no limit)",
    )
    serve.add_argument(
        "--adjustments-at-once",
        type=_whole,
        default=None,
        metavar="N",
        help="adjustments run at the same time, the others wait their turn "
        "(default: $STATIONFIT_ADJUSTMENTS_AT_ONCE, else 1)",
    )
    serve.add_argument(
        "--max-waiting",
        type=_whole,
        default=None,
        metavar="N",
        help="adjustments allowed to wait; more get 503 "
        "(default: $STATIONFIT_MAX_WAITING, else 20; 0: no bound)",
    )
    serve.add_argument(
        "--https",
        action="store_true",
        default=None,
        help="a reverse proxy serves it over https: session cookies are sent over https only "
        "(default: $STATIONFIT_HTTPS); needs accounts",
    )
    serve.add_argument(
        "--keep-deleted-days",
        type=_whole,
        default=None,
        metavar="DAYS",
        help="days a deleted project can be restored before it is erased "
        "(default: $STATIONFIT_KEEP_DELETED_DAYS, else 30; 0: erase at once)",
    )
    _worker_command(commands)
    _import_command(commands)
    _plan_command(commands)
    _monitor_command(commands)
    _users_command(commands)
    args = parser.parse_args(argv)
    if args.command == "serve":
        return _serve(args)
    if args.command == "worker":
        return _worker(args)
    if args.command == "users":
        return _users(args)
    if args.command == "import":
        return _import(args)
    if args.command == "plan":
        return _plan(args)
    if args.command == "monitor":
        return _monitor(args)
    return _adjust(args)


IMPORT_HELP = """Turn a data collector's file into field book text on stdout.

FILE.xml is the open survey-XML standard (1.2 or 2.0): control points, instrument setups,
raw readings, GNSS vectors with covariances, the instrument's accuracies, the CRS.
FILE.csv is a table of readings with a header row (columns station, target, hz, zenith,
slope, face, set, hi, ht; see docs/import.md), in --length-unit and --angle-unit.

Face I / face II pairs are meaned, collimation and index error reported per setup, sets
of rounds meaned with their spreads. A face difference or spread above its tolerance is a
warning (stderr, and a comment above its line); nothing is dropped. Every written line names
its source line in FILE. Nothing the file does not state is invented: centering is written
as 0mm and missing accuracies are left for you to add."""


def _import_command(commands: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    command = commands.add_parser(
        "import",
        help="survey XML or CSV of readings → field book text",
        epilog=EXIT_STATUSES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description=IMPORT_HELP,
    )
    command.add_argument("file", type=Path, metavar="FILE.xml|FILE.csv")
    command.add_argument(
        "--face-tolerance",
        default="20sec",
        metavar="ANGLE",
        help="largest face I / face II difference, 2c or 2i (default 20sec)",
    )
    command.add_argument(
        "--set-tolerance",
        default="5sec",
        metavar="ANGLE",
        help="largest spread of a direction or zenith over the sets (default 5sec)",
    )
    command.add_argument(
        "--distance-tolerance",
        default="5mm",
        metavar="LENGTH",
        help="largest spread of a slope distance over the sets (default 5mm)",
    )
    command.add_argument(
        "--length-unit",
        choices=("m", "ft", "usft"),
        default="m",
        help="CSV only: unit of lengths (default m)",
    )
    command.add_argument(
        "--angle-unit",
        choices=("dms", "deg", "gon"),
        default="dms",
        help="CSV only: unit of angles (default dms, D:M:S)",
    )


def _import(args: argparse.Namespace) -> int:
    from server.formats.importing import ImportOptions, import_file
    from server.units import UnitError

    path: Path = args.file
    try:
        options = ImportOptions.from_text(
            args.face_tolerance,
            args.set_tolerance,
            args.distance_tolerance,
            args.length_unit,
            args.angle_unit,
        )
    except UnitError as exc:
        print(f"stationfit import: error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    try:
        data = path.read_bytes()
    except OSError as exc:
        print(f"{path}: cannot read the file: {exc.strerror or exc}", file=sys.stderr)
        return EXIT_USAGE
    try:
        imported = import_file(data, str(path), options)
    except FieldbookError as exc:
        print(str(exc), file=sys.stderr)
        return EXIT_FIELDBOOK
    for line, message in imported.warnings:
        print(f"{path}:{line}: warning: {message}", file=sys.stderr)
    sys.stdout.write(imported.text)
    return EXIT_OK


PLAN_STATUSES = """exit statuses:
  0   designed
  2   the field book has errors: each on stderr as FILE:LINE: message
  3   the design cannot be computed: a point without approximate coordinates, or points
      the planned observations do not determine (named)
  64  the command line cannot be followed (unknown option, unreadable file)"""

PLAN_HELP = """Design a network before the field: FILE lists the planned observations with their
standard deviations and ? for the value, and every point's approximate coordinates.

Printed: point standard deviations and confidence ellipses (a priori, sigma0 = 1), relative
ellipses against tolerance relative=, redundancy numbers (weakly controlled below 0.3), MDB
and its largest effect on the points (external reliability), inseparable w-tests.
A value booked instead of ? is read but not used. See docs/design.md."""


def _plan_command(commands: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    command = commands.add_parser(
        "plan",
        help="design of a planned network: precision and reliability, no values",
        epilog=PLAN_STATUSES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description=PLAN_HELP,
    )
    command.add_argument("file", type=Path)
    command.add_argument("--json", action="store_true", help="print the JSON result alone")
    command.add_argument("--report", type=Path, metavar="FILE.html", help="write the HTML report")
    command.add_argument("--pdf", type=Path, metavar="FILE.pdf", help="write the PDF report")


def _plan(args: argparse.Namespace) -> int:
    from server.design.plan import plan_fieldbook

    path: Path = args.file
    try:
        data = path.read_bytes()
    except OSError as exc:
        print(f"{path}: cannot read the file: {exc.strerror or exc}", file=sys.stderr)
        return EXIT_USAGE
    try:
        result = plan_fieldbook(data, source=str(path))
    except FieldbookError as exc:
        print(str(exc), file=sys.stderr)
        return EXIT_FIELDBOOK
    except NetworkError as exc:
        print(f"{path}: the network cannot be designed: {exc}", file=sys.stderr)
        return EXIT_NETWORK
    if args.pdf is not None:
        from server.report.design_pdf import design_pdf

        args.pdf.write_bytes(design_pdf(result))
    if args.report is not None:
        from server.report.design_html import design_html

        args.report.write_text(design_html(result), encoding="utf-8")
    if args.json:
        write_json(result.to_json_dict())
    else:
        from server.report.design_text import design_text

        sys.stdout.write(design_text(result))
    return EXIT_OK


MONITOR_HELP = """Compare field books of the same marks observed at different epochs.

Each BOOK is adjusted; the epochs are ordered by their 'epoch' line. The first epoch is
compared with every later one by the congruence test: both are laid on the datum of the marks
assumed stable, the global test of "no mark moved" is made, and while it fails the mark whose
removal lowers the test most leaves the stable set. Each mark's displacement is given with
its standard deviation, ellipse and own test. With three or more epochs each mark's
components are fitted with an offset, a rate and, given --period, a periodic term
(see docs/monitoring.md)."""

MONITOR_STATUSES = """exit statuses:
  0   compared (whether or not marks moved or alarms rang)
  2   a field book has errors: each on stderr as FILE:LINE: message
  3   the epochs cannot be compared (no common marks, different components), or a book's
      network cannot be adjusted: what is wrong, naming the marks
  64  the command line cannot be followed (unknown option, unreadable file)"""


def _monitor_command(commands: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    command = commands.add_parser(
        "monitor",
        help="compare epochs: congruence test, displacements, time series",
        epilog=MONITOR_STATUSES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description=MONITOR_HELP,
    )
    command.add_argument(
        "books", type=Path, nargs="+", metavar="BOOK", help="two or more field books, one per epoch"
    )
    command.add_argument(
        "--json", action="store_true", help="print the JSON of docs/monitoring.md alone on stdout"
    )
    command.add_argument(
        "--period",
        default=None,
        metavar="DAYS",
        help="period of a periodic term in days (365.25), or in hours "
        "with h (12.42h); needs five epochs",
    )
    command.add_argument(
        "--threshold",
        default=None,
        metavar="LENGTH",
        help="alarm when a movement exceeds this at the chosen confidence "
        "(the first book's length unit, or with a unit: 5mm)",
    )
    command.add_argument(
        "--confidence",
        type=float,
        default=0.95,
        metavar="P",
        help="confidence of the tests, intervals and alarms (default 0.95)",
    )
    command.add_argument(
        "--predict",
        default=None,
        metavar="DATE",
        help="date (or UTC time) of the prediction and the alarm's movement "
        "(default: the last epoch)",
    )


def _monitor(args: argparse.Namespace) -> int:
    from server.monitoring.command import run_monitor

    return run_monitor(args, EXIT_OK, EXIT_FIELDBOOK, EXIT_NETWORK, EXIT_USAGE)


def _limit_options(command: argparse.ArgumentParser, observations: str, unknowns: str) -> None:
    command.add_argument(
        "--max-observations",
        type=_whole,
        default=None,
        metavar="N",
        help=f"refuse field books with more observations {observations}",
    )
    command.add_argument(
        "--max-unknowns",
        type=_whole,
        default=None,
        metavar="N",
        help=f"refuse networks with more unknowns {unknowns}",
    )


def _whole(text: str) -> int:
    if not text.isdigit():
        raise argparse.ArgumentTypeError(f"a whole number is needed, not {text!r}")
    return int(text)


def _adjust(args: argparse.Namespace) -> int:
    from server.pipeline import adjust_fieldbook
    from server.settings import WorkLimits

    limits = WorkLimits(args.max_observations or None, args.max_unknowns or None)
    path: Path = args.file
    try:
        data = path.read_bytes()
    except OSError as exc:
        print(f"{path}: cannot read the file: {exc.strerror or exc}", file=sys.stderr)
        return EXIT_USAGE
    progress = _TerminalProgress(sys.stderr) if sys.stderr.isatty() else None
    try:
        result = adjust_fieldbook(
            data, source=str(path), progress=progress, limits=limits, forked=True
        )
    except FieldbookError as exc:
        _clear(progress)
        print(str(exc), file=sys.stderr)
        return EXIT_FIELDBOOK
    except NetworkError as exc:
        _clear(progress)
        print(f"{path}: the network cannot be adjusted: {exc}", file=sys.stderr)
        return EXIT_NETWORK
    _clear(progress)
    if args.pdf is not None:
        from server.report.pdf import report_pdf

        args.pdf.write_bytes(report_pdf(result))
    if args.report is not None:
        from server.report.html import report_html

        args.report.write_text(report_html(result), encoding="utf-8")
    if args.csv is not None:
        from server.report.csv_export import points_csv

        args.csv.write_text(points_csv(result), encoding="utf-8", newline="")
    if args.json:
        from server.results.json_result import write_result_json

        write_result_json(result)
    else:
        from server.report.text import report_text

        sys.stdout.write(report_text(result))
    return EXIT_OK


class _TerminalProgress:
    """Shows the stage of a long adjustment on one line of the terminal (stderr only)."""

    #: Say nothing for adjustments that finish sooner than this (seconds).
    QUIET_FOR = 1.0

    def __init__(self, stream: TextIO) -> None:
        import time

        self._clock = time.monotonic
        self._start = self._clock()
        self._stream = stream
        self.shown = False

    def __call__(self, stage: str, step: int) -> None:
        elapsed = self._clock() - self._start
        if elapsed < self.QUIET_FOR:
            return
        what = f"iteration {step}" if stage == "iteration" else stage
        self._stream.write(f"\rStationfit: {what}… ({elapsed:.0f} s)\033[K")
        self._stream.flush()
        self.shown = True


def _clear(progress: _TerminalProgress | None) -> None:
    if progress is not None and progress.shown:
        progress._stream.write("\r\033[K")
        progress._stream.flush()


def _log_to_stderr() -> None:
    """The service's own log lines (deletions, restores, refused requests) on stderr for the
    administrator; uvicorn keeps its own handlers."""
    import logging

    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    log = logging.getLogger("stationfit")
    log.addHandler(handler)
    log.setLevel(logging.INFO)
    log.propagate = False


def _serve(args: argparse.Namespace) -> int:
    import uvicorn

    from server.settings import default_data_dir, service_limits
    from server.store.backends import storage_errors, without_password
    from server.web.app import behind_https, create_app, needs_accounts, serve_allowed_hosts
    from server.web.serving import uvicorn_options

    host, port, data = args.host, args.port, args.data
    _log_to_stderr()
    limits = service_limits(args.max_observations, args.max_unknowns)
    data_dir = data if data is not None else default_data_dir()
    https = args.https or behind_https()
    allowed_hosts = serve_allowed_hosts(host)
    database = _database_option(args.database)
    where = f"--data {data_dir}" if database is None else "--database URL"
    try:
        if database is None:
            data_dir.mkdir(parents=True, exist_ok=True)
        reachable = needs_accounts(host, allowed_hosts, https)
        if reachable and not _accounts(data_dir, database).configured():
            print(
                f"Stationfit: not starting: {reachable}, and there are no accounts, so anyone "
                "could read, change and delete every project. Add one first: "
                f"python -m server users add NAME --role surveyor {where}",
                file=sys.stderr,
            )
            return EXIT_CONFIG
        app = create_app(
            data_dir,
            allowed_hosts=allowed_hosts,
            limits=limits,
            adjustments_at_once=args.adjustments_at_once or None,
            max_waiting=args.max_waiting,
            keep_deleted_days=args.keep_deleted_days,
            database=database,
            secure_cookies=https,
        )
    except _failures(storage_errors()) as exc:
        # one line for the administrator: which folder, and what the system said
        reason = " ".join((getattr(exc, "strerror", None) or str(exc)).split())
        if database is not None:
            print(
                f"Stationfit: cannot use the database {without_password(database)}: {reason}. "
                "Check the address, that PostgreSQL runs and that this user may connect.",
                file=sys.stderr,
            )
        else:
            print(
                f"Stationfit: cannot use the data folder {data_dir}: {reason}. Give --data a "
                "folder the service may write to, or fix this one.",
                file=sys.stderr,
            )
        return EXIT_DATA
    mode = (
        "accounts: sign-in required"
        if app.state.accounts.configured()
        else "workstation mode: no accounts, no sign-in, this computer only"
    )
    stored = data_dir if database is None else without_password(database)
    print(
        f"Stationfit: projects are stored in {stored} ({mode}); open http://{host}:{port}/",
        file=sys.stderr,
    )
    uvicorn.run(app, host=host, port=port, log_level="warning", **uvicorn_options())
    return EXIT_OK


def _database_option(value: str | None) -> str | None:
    """``--database``, else $STATIONFIT_DATABASE; None for the data folder's SQLite file."""
    value = value or os.environ.get("STATIONFIT_DATABASE") or None
    return value.strip() if value else None


def _worker_command(commands: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    command = commands.add_parser(
        "worker",
        help="adjust uploads for a service whose projects are in PostgreSQL",
        epilog=EXIT_STATUSES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Take adjustment jobs from the task queue in the PostgreSQL database "
        "that `serve --database` uses, on this machine or another, until stopped (SIGTERM "
        "or Ctrl-C: the job in hand is finished first). A worker that dies mid-job loses "
        "nothing: another worker adjusts the run again.",
    )
    command.add_argument(
        "--database",
        default=None,
        metavar="postgresql://…",
        help="the service's database (default: $STATIONFIT_DATABASE)",
    )
    command.add_argument(
        "--concurrency",
        type=_whole,
        default=1,
        metavar="N",
        help="adjustments this worker runs at once (default 1; run one worker per core)",
    )
    _limit_options(
        command,
        "(default: $STATIONFIT_MAX_OBSERVATIONS, else 200000; 0: no limit)",
        "(default: $STATIONFIT_MAX_UNKNOWNS, else 100000; 0: no limit)",
    )
    command.add_argument(
        "--heartbeat-seconds",
        type=float,
        default=10.0,
        metavar="S",
        help="seconds between this worker's heartbeats (default 10)",
    )
    command.add_argument(
        "--stalled-after-seconds",
        type=float,
        default=30.0,
        metavar="S",
        help="a worker silent this long is taken for dead and its job given to another "
        "(default 30; keep it several heartbeats long)",
    )


def _worker(args: argparse.Namespace) -> int:
    import asyncio
    import logging

    from server.settings import service_limits
    from server.store.backends import storage_errors, without_password
    from server.web.workers import WorkerSettings, run_worker

    database = _database_option(args.database)
    if database is None or not database.startswith(("postgresql://", "postgres://")):
        print(
            "Stationfit: a worker needs the service's PostgreSQL database: --database "
            "postgresql://USER@HOST/NAME (or $STATIONFIT_DATABASE).",
            file=sys.stderr,
        )
        return EXIT_USAGE
    _log_to_stderr()
    logging.getLogger("procrastinate").setLevel(logging.WARNING)
    settings = WorkerSettings(
        concurrency=max(1, args.concurrency),
        limits=service_limits(args.max_observations, args.max_unknowns),
        heartbeat_seconds=args.heartbeat_seconds,
        stalled_after_seconds=args.stalled_after_seconds,
    )
    shown = without_password(database)

    def ready() -> None:
        print(f"Stationfit worker: taking adjustments from {shown}", file=sys.stderr, flush=True)

    try:
        asyncio.run(run_worker(database, settings, ready))
    except _failures(storage_errors()) as exc:
        reason = " ".join(str(exc).split())
        print(f"Stationfit worker: cannot use the database {shown}: {reason}", file=sys.stderr)
        return EXIT_DATA
    except KeyboardInterrupt:
        pass
    return EXIT_OK


def _failures(storage: tuple[type[Exception], ...]) -> tuple[type[Exception], ...]:
    """What a command reports in one line when its store cannot be used."""
    return (OSError, RuntimeError, *storage)


# --------------------------------------------------------------------------------------
# users: the office's accounts, in the same data folder ``serve --data DIR`` uses

USERS_HELP = """Manage the accounts of an office service (stored in the data folder's database).

With no account, `serve` on 127.0.0.1 is a single-user workstation without sign-in, and
refuses to serve others. Roles: viewer (reads), technician (uploads, proposes decisions,
re-runs), surveyor (the surveyor in responsible charge: also decides and approves runs),
administrator (manages accounts). A password is read from standard input (asked twice
on a terminal), or made with --generate and printed once. Accounts are never deleted
(the review trail names them): disable them."""


def _users_command(commands: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    users = commands.add_parser(
        "users",
        help="manage the accounts of an office service",
        description=USERS_HELP,
        epilog=EXIT_STATUSES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    actions = users.add_subparsers(dest="action", required=True, parser_class=_Parser)
    data_help = "the data folder, as given to serve --data (default: $STATIONFIT_DATA)"
    database_help = (
        "the PostgreSQL database, as given to serve --database (default: $STATIONFIT_DATABASE)"
    )

    def action(name: str, help_text: str) -> argparse.ArgumentParser:
        parser: argparse.ArgumentParser = actions.add_parser(name, help=help_text)
        parser.add_argument("--data", type=Path, default=None, help=data_help)
        parser.add_argument(
            "--database", default=None, metavar="postgresql://…", help=database_help
        )
        return parser

    add = action("add", "add an account")
    add.add_argument("name")
    add.add_argument("--role", required=True, choices=_roles())
    add.add_argument("--generate", action="store_true", help="make a password and print it once")
    action("list", "list the accounts")
    set_role = action("set-role", "change an account's role (its sessions end)")
    set_role.add_argument("name")
    set_role.add_argument("role", choices=_roles())
    action("disable", "stop an account signing in (its sessions end)").add_argument("name")
    action("enable", "let a disabled account sign in again").add_argument("name")
    password = action("password", "set a new password (its sessions end)")
    password.add_argument("name")
    password.add_argument(
        "--generate", action="store_true", help="make a password and print it once"
    )


def _roles() -> tuple[str, ...]:
    from server.store.roles import ROLES  # not the accounts: every command builds this help

    return ROLES


def _accounts(data_dir: Path, database: str | None = None):  # type: ignore[no-untyped-def]
    """The accounts of the data folder's store, or of the PostgreSQL database (created or
    upgraded like ``serve`` does)."""
    from server.store.accounts import Accounts
    from server.store.sqlite import Store
    from server.web.app import DATABASE_NAME

    return Accounts(Store(database) if database else Store(data_dir / DATABASE_NAME))


def _read_password(generate: bool) -> tuple[str, bool]:
    """(password, generated): made, asked twice on a terminal, or the first line of stdin."""
    from server.store.accounts import generated_password

    if generate:
        return generated_password(), True
    if sys.stdin.isatty():
        import getpass

        first = getpass.getpass("Password: ")
        if getpass.getpass("Again: ") != first:
            raise _UsersError("The two passwords differ; nothing was changed.")
        return first, False
    line = sys.stdin.readline().rstrip("\r\n")
    if not line:
        raise _UsersError(
            "No password on standard input: pipe one in, or give --generate to have one made."
        )
    return line, False


class _UsersError(Exception):
    """A users command that cannot be followed: the message, exit 64."""


def _users(args: argparse.Namespace) -> int:
    from server.settings import default_data_dir
    from server.store.accounts import AccountError
    from server.store.backends import storage_errors, without_password
    from server.store.roles import ROLE_TITLES

    data_dir = args.data if args.data is not None else default_data_dir()
    database = _database_option(args.database)
    try:
        if database is None:
            data_dir.mkdir(parents=True, exist_ok=True)
        accounts = _accounts(data_dir, database)
    except _failures(storage_errors()) as exc:
        reason = " ".join((getattr(exc, "strerror", None) or str(exc)).split())
        where = (
            f"the data folder {data_dir}"
            if database is None
            else f"the database {without_password(database)}"
        )
        print(f"stationfit users: cannot use {where}: {reason}", file=sys.stderr)
        return EXIT_DATA
    try:
        if args.action == "list":
            for user in accounts.all():
                state = "active" if user.active else f"disabled {user.disabled}"
                last = user.last_sign_in or "never signed in"
                print(f"{user.name}\t{ROLE_TITLES[user.role]}\t{state}\tlast sign-in: {last}")
            return EXIT_OK
        if args.action == "add":
            password, generated = _read_password(args.generate)
            user = accounts.add(args.name, args.role, password)
            place = data_dir if database is None else without_password(database)
            print(f"added {user.name} ({ROLE_TITLES[user.role]}) in {place}", file=sys.stderr)
        elif args.action == "password":
            password, generated = _read_password(args.generate)
            user = accounts.set_password(args.name, password)
            print(f"new password for {user.name}; their sessions have ended", file=sys.stderr)
        else:
            generated, password = False, ""
            if args.action == "set-role":
                user = accounts.set_role(args.name, args.role)
                what = f"is now {ROLE_TITLES[user.role]}"
            else:
                user = accounts.set_disabled(args.name, args.action == "disable")
                what = "is disabled" if args.action == "disable" else "may sign in again"
            print(f"{user.name} {what}; their sessions have ended", file=sys.stderr)
    except (AccountError, _UsersError) as exc:
        print(f"stationfit users: {exc}", file=sys.stderr)
        return EXIT_USAGE
    if generated:
        print(f"password for {user.name} (shown once, pass it on safely): {password}")
    return EXIT_OK
