"""Start the decision service: ``python policies-demo/service/serve.py --rule build/packhouse.rule``.

Run as a script, so this directory is on ``sys.path`` and ``app`` is the module beside this file.
"""

from __future__ import annotations

import argparse
import ipaddress
import logging
import sys

import uvicorn
from app import MAX_RECORDS, StartupError, create_app


def _is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="serve.py", description="Serve decisions from one compiled policyc rule over HTTP (JSON)."
    )
    parser.add_argument("--rule", required=True, help="path of the compiled rule artefact to serve")
    parser.add_argument("--host", default="127.0.0.1", help="address to listen on (default: 127.0.0.1)")
    parser.add_argument("--port", type=int, default=8080, help="port to listen on (default: 8080)")
    parser.add_argument(
        "--max-records", type=int, default=MAX_RECORDS, help=f"records per request (default: {MAX_RECORDS})"
    )
    parser.add_argument(
        "--no-admin", action="store_true", help="leave out POST /admin/reload (the rule is then fixed for the run)"
    )
    parser.add_argument(
        "--log-level", default="info", choices=["critical", "error", "warning", "info", "debug"], help="log level"
    )
    args = parser.parse_args(argv)
    if args.max_records < 1:
        parser.error("--max-records must be at least 1")

    logging.basicConfig(level=args.log_level.upper(), format="%(levelname)s:     %(name)s: %(message)s")
    try:
        app = create_app(args.rule, max_records=args.max_records, enable_admin=not args.no_admin)
    except StartupError as exc:
        print(f"serve.py: {exc}", file=sys.stderr)
        return 1
    if not args.no_admin and not _is_loopback(args.host):
        logging.getLogger("policyc.service").warning(
            "listening on %s with POST /admin/reload enabled and unauthenticated: anyone who can reach this "
            "address can swap the rule. Put it behind an authenticating proxy or pass --no-admin.",
            args.host,
        )
    uvicorn.run(app, host=args.host, port=args.port, log_level=args.log_level)
    return 0


if __name__ == "__main__":
    sys.exit(main())
