"""`advisory web`: serve the agents' and growers' web console."""

from __future__ import annotations

import logging

from advisory.errors import InputError

DEFAULT_HOST = "127.0.0.1"
DEFAULT_PORT = 8040


def register(sub) -> None:
    p = sub.add_parser("web", help="serve the web console (Tonight, blocks, stations, skill) on this machine",
                       description="Serve the web console. Add users first with `advisory users add`. "
                                   "The session cookies are signed with $ADVISORY_WEB_SECRET, [web] secret of "
                                   "the settings file, or a random key kept in the data folder.")
    p.add_argument("--host", default=DEFAULT_HOST, help=f"address to listen on (default {DEFAULT_HOST})")
    p.add_argument("--port", type=int, default=DEFAULT_PORT, help=f"port (default {DEFAULT_PORT})")
    p.add_argument("--https-only", action="store_true",
                   help="mark the session cookie Secure (when a TLS proxy sits in front)")
    p.set_defaults(func=run)


def run(args) -> int:
    if not 1 <= args.port <= 65535:
        raise InputError(f"{args.port} is not a port number", field="--port")
    import uvicorn

    from advisory.web.app import create_app

    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(name)s %(levelname)s %(message)s")
    app = create_app(args.db, https_only=args.https_only)
    print(f"advisory web console on http://{args.host}:{args.port}/  (Ctrl-C stops it)", flush=True)
    uvicorn.run(app, host=args.host, port=args.port, log_level="info", access_log=False)
    return 0
