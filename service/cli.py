"""`knowngood serve [MODEL] [--part-type NAME] [--host] [--port] [--db URL] [--data-dir]`: registered under the
`knowngood.commands` entry point, so `training.cli` offers it without importing the service. Flags override
KNOWNGOOD_* environment settings."""

from __future__ import annotations

import argparse
import logging
import sys
from pathlib import Path


def register(subparsers) -> None:
    """Adds the `serve` sub-command to the `knowngood` parser's subparsers."""
    p = subparsers.add_parser(
        "serve",
        help="run the REST service and the operator page",
        description="Serve a model bundle over REST v1. Tokens and limits come from KNOWNGOOD_* "
        "environment variables (see the README); flags override them.",
    )
    p.add_argument(
        "model",
        type=Path,
        nargs="?",
        default=None,
        metavar="MODEL",
        help="model bundle to serve for --part-type (optional once the audit store serves models)",
    )
    p.add_argument(
        "--part-type",
        default=None,
        metavar="NAME",
        help="the part type MODEL inspects (default 'default'); others are added with PUT /v1/part-types/NAME/model",
    )
    p.add_argument("--host", default=None, help="address to listen on (default 127.0.0.1; 0.0.0.0 in the container)")
    p.add_argument("--port", type=int, default=None, help="port (default 8000)")
    p.add_argument(
        "--db",
        default=None,
        metavar="URL",
        help="audit store: an SQLite file (default knowngood.db) or postgresql://user@host/db, which several "
        "instances share",
    )
    p.add_argument(
        "--data-dir", type=Path, default=None, help="what earlier versions kept in a folder (knowngood-data)"
    )
    p.set_defaults(func=serve)


def _settings(args):
    from knowngood.service.settings import Settings
    from pydantic import ValidationError

    flags = {
        "model_path": args.model,
        "part_type": args.part_type,
        "host": args.host,
        "port": args.port,
        "data_dir": args.data_dir,
    }
    if args.db is not None:
        flags["database_url" if "://" in args.db else "db"] = args.db
    try:
        return Settings(**{k: v for k, v in flags.items() if v is not None})
    except ValidationError as exc:
        for e in exc.errors():
            where = ".".join(str(p) for p in e.get("loc", ())) or "settings"
            print(f"knowngood serve: {where}: {e['msg'].removeprefix('Value error, ')}", file=sys.stderr)
        return None


def serve(args) -> int:
    """Starts uvicorn in this process; returns the exit code (0 after a clean shutdown, 2 for bad settings)."""
    settings = _settings(args)
    if settings is None:
        return 2
    import uvicorn
    from knowngood.service.app import create_app

    logging.basicConfig(level=settings.log_level.upper(), format="%(levelname)-9s %(message)s")
    app = create_app(settings)
    config = uvicorn.Config(
        app,
        host=settings.host,
        port=settings.port,
        log_level=settings.log_level,
        access_log=False,
        timeout_graceful_shutdown=10,
    )
    server = uvicorn.Server(config)
    try:
        server.run()
    except SystemExit:
        if server.started:
            raise
    if server.started:
        return 0
    error = getattr(app.state, "startup_error", None)  # a bad bundle; otherwise uvicorn said why (a busy port)
    print(f"knowngood serve: error: {error or 'the service did not start (see above)'}", file=sys.stderr)
    return getattr(error, "exit_code", 2)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="knowngood")
    register(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(argv)
    return args.func(args)


if __name__ == "__main__":
    sys.exit(main())
