"""Command line: ``python -m server adjust FILE`` and ``python -m server serve``.

Exit statuses follow the result contract: 0 adjusted (tests pass or not),
2 field book errors, 3 network cannot be adjusted.  Errors go to stderr as
plain sentences, never as a traceback.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from .errors import FieldbookError, NetworkError

EXIT_OK, EXIT_FIELDBOOK, EXIT_NETWORK, EXIT_USAGE = 0, 2, 3, 64


def main(argv: list[str] | None = None) -> int:
    """Run the command line; returns the exit status."""
    parser = argparse.ArgumentParser(prog="python -m server", description="Stationfit adjustment")
    commands = parser.add_subparsers(dest="command", required=True)
    adjust = commands.add_parser("adjust", help="adjust a field book")
    adjust.add_argument("file", type=Path)
    adjust.add_argument("--json", action="store_true", help="print the JSON result alone on stdout")
    adjust.add_argument("--report", type=Path, metavar="FILE.html", help="write the HTML report")
    adjust.add_argument("--pdf", type=Path, metavar="FILE.pdf", help="write the PDF report")
    adjust.add_argument("--csv", type=Path, metavar="FILE.csv", help="write the adjusted points as CSV")
    serve = commands.add_parser("serve", help="start the web service")
    serve.add_argument("--host", default="127.0.0.1")
    serve.add_argument("--port", type=int, default=8000)
    serve.add_argument("--data", type=Path, default=None, help="where projects are stored")
    args = parser.parse_args(argv)
    if args.command == "serve":
        return _serve(args.host, args.port, args.data)
    return _adjust(args)


def _adjust(args: argparse.Namespace) -> int:
    from .pipeline import adjust_fieldbook

    path: Path = args.file
    try:
        data = path.read_bytes()
    except OSError as exc:
        print(f"{path}: cannot read the file: {exc.strerror or exc}", file=sys.stderr)
        return EXIT_USAGE
    try:
        result = adjust_fieldbook(data, source=str(path))
    except FieldbookError as exc:
        print(str(exc), file=sys.stderr)
        return EXIT_FIELDBOOK
    except NetworkError as exc:
        print(f"{path}: the network cannot be adjusted: {exc}", file=sys.stderr)
        return EXIT_NETWORK
    if args.pdf is not None:
        print(f"{path}: PDF reports are not available yet; use --report FILE.html", file=sys.stderr)
        return EXIT_NETWORK
    from . import report

    if args.report is not None:
        args.report.write_text(report.report_html(result), encoding="utf-8")
    if args.csv is not None:
        args.csv.write_text(report.points_csv(result), encoding="utf-8", newline="")
    if args.json:
        json.dump(result.to_json_dict(), sys.stdout, indent=2, allow_nan=False)
        sys.stdout.write("\n")
    else:
        sys.stdout.write(report.report_text(result))
    return EXIT_OK


def _serve(host: str, port: int, data: Path | None) -> int:
    import uvicorn

    from .settings import default_data_dir
    from .web.app import create_app

    data_dir = data if data is not None else default_data_dir()
    data_dir.mkdir(parents=True, exist_ok=True)
    print(f"Stationfit: projects are stored in {data_dir}; open http://{host}:{port}/", file=sys.stderr)
    uvicorn.run(create_app(data_dir), host=host, port=port, log_level="warning")
    return EXIT_OK


if __name__ == "__main__":
    sys.exit(main())
