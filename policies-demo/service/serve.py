"""Start the decision service: ``python policies-demo/service/serve.py --rule build/packhouse.rule``.

Run as a script, so this directory is on ``sys.path`` and ``app`` is the module beside this file.
"""

from __future__ import annotations

import argparse
import logging
import os
import sys

import uvicorn
from app import MAX_RECORDS, StartupError, create_app, is_loopback

TOKEN_VARIABLE = "POLICYC_RELOAD_TOKEN"
"""Environment variable holding the reload token (never a command-line option: others can read those)."""


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
        "--rules-dir",
        help="directory POST /admin/reload loads rule files from, by file name (default: the directory of --rule)",
    )
    parser.add_argument(
        "--log-level", default="info", choices=["critical", "error", "warning", "info", "debug"], help="log level"
    )
    args = parser.parse_args(argv)
    if args.max_records < 1:
        parser.error("--max-records must be at least 1")

    token = os.environ.get(TOKEN_VARIABLE) or None
    if not args.no_admin and token is None and not is_loopback(args.host):
        parser.error(
            f"listening on {args.host} with POST /admin/reload needs a reload token: set {TOKEN_VARIABLE}, "
            "or pass --no-admin"
        )

    logging.basicConfig(level=args.log_level.upper(), format="%(levelname)s:     %(name)s: %(message)s")
    try:
        app = create_app(
            args.rule,
            max_records=args.max_records,
            enable_admin=not args.no_admin,
            rules_dir=args.rules_dir,
            reload_token=token,
        )
    except StartupError as exc:
        print(f"serve.py: {exc}", file=sys.stderr)
        return 1
    uvicorn.run(app, host=args.host, port=args.port, log_level=args.log_level)
    return 0


if __name__ == "__main__":
    sys.exit(main())
