"""An HTTP service that embeds one compiled policyc rule.

``create_app(rule_path)`` loads and verifies the artefact, then returns a
Starlette application with three endpoints:

* ``POST /decide``: decide one record or a batch, optionally with posteriors,
  risks, runner-up and margin per record;
* ``GET /health``: the identity of the rule being served;
* ``POST /admin/reload``: swap in another artefact without dropping requests. It loads only files
  named by their rule file name inside one configured directory, and needs a bearer token, or
  else a request from loopback.

Only ``policyc.runtime`` is imported from policyc, so the service needs numpy,
the standard library, Starlette and uvicorn; the compiler stays out of the
process. See README.md beside this file for the request and response shapes.

Concurrency model: the serving rule lives in one attribute (``RuleSlot``) that
holds an immutable ``Serving`` record. A request reads that attribute exactly
once and uses what it got for validation, the decision and the identity it
reports; a reload builds and verifies a complete new ``Serving`` before
replacing the attribute with a single assignment (atomic in CPython). A request
therefore sees the old rule or the new one, never a mix, and a failed reload
leaves the old rule in place.
"""

from __future__ import annotations

import hmac
import ipaddress
import json
import logging
import math
import os
import re
import stat
import threading
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from http import HTTPStatus
from types import MappingProxyType
from typing import Any

import numpy as np
from starlette.applications import Starlette
from starlette.concurrency import run_in_threadpool
from starlette.exceptions import HTTPException
from starlette.requests import Request
from starlette.responses import JSONResponse, Response
from starlette.routing import Route

from policyc.runtime import ArtefactError, Explanation, Rule, load_rule

__all__ = [
    "MAX_BODY_BYTES",
    "MAX_RECORDS",
    "ReloadRefused",
    "RuleNotAvailable",
    "RuleSlot",
    "Serving",
    "StartupError",
    "create_app",
    "is_loopback",
    "load_serving",
]

MAX_RECORDS = 10_000
"""Records accepted in one POST /decide; more is answered with 413."""

MAX_BODY_BYTES = 16 * 1024 * 1024
"""Request bodies larger than this are answered with 413 before they are parsed."""

MAX_REPORTED_PROBLEMS = 20
"""Problems listed in one 422 answer; the total count is always given."""

_DECIDE_KEYS = frozenset({"record", "records", "explain"})
_RELOAD_KEYS = frozenset({"rule", "allow_feature_change"})
RULE_FILE_NAME = re.compile(r"^[A-Za-z0-9_][A-Za-z0-9_.-]{0,254}$")
"""A rule file name for reload: no path separator, no leading dot (so neither ``..`` nor hidden files)."""

log = logging.getLogger("policyc.service")


class StartupError(RuntimeError):
    """The service refuses to start: the artefact given at start-up cannot be served."""


class ReloadRefused(ValueError):
    """A reload found a valid artefact that the service will not swap in without being told to."""


class RuleNotAvailable(LookupError):
    """No readable regular rule file of that name in the rules directory.

    One answer whether the file is missing, unreadable, not a regular file or a link leading out of the
    directory, so the endpoint tells nobody which files exist on the server.
    """


def is_loopback(host: str | None) -> bool:
    """Whether ``host`` (a name or an address) is this machine's loopback."""
    if host == "localhost":
        return True
    try:
        return host is not None and ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def rule_in_directory(rules_dir: str, name: str) -> str:
    """The real path of the regular, readable file ``name`` directly inside ``rules_dir`` (itself a real path)."""
    real = os.path.realpath(os.path.join(rules_dir, name))
    if os.path.dirname(real) != rules_dir:  # a symbolic link leading elsewhere
        raise RuleNotAvailable(name)
    try:
        descriptor = os.open(real, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
    except OSError:
        raise RuleNotAvailable(name) from None
    try:
        if not stat.S_ISREG(os.fstat(descriptor).st_mode):
            raise RuleNotAvailable(name)
    finally:
        os.close(descriptor)
    return real


class RequestProblem(Exception):
    """Answered as a 4xx with a JSON body ``{"error": code, "message": ..., ...extra}``."""

    def __init__(self, status: int, code: str, message: str, **extra: Any) -> None:
        super().__init__(message)
        self.status = status
        self.code = code
        self.message = message
        self.extra = extra

    def body(self) -> dict[str, Any]:
        return {"error": self.code, "message": self.message, **self.extra}


@dataclass(frozen=True)
class Serving:
    """One loaded, verified rule and where it came from. Never mutated: a reload makes a new one."""

    rule: Rule
    path: str
    loaded_at: str
    feature_index: Mapping[str, int] = field(repr=False)

    def identity(self) -> dict[str, Any]:
        """What a caller needs to tell which rule decided."""
        return {
            "policy": self.rule.manifest.get("policy"),
            "revision": self.rule.manifest.get("revision"),
            "content_sha256": self.rule.content_sha256,
        }

    def description(self) -> dict[str, Any]:
        return {
            **self.identity(),
            "classes": list(self.rule.classes),
            "actions": list(self.rule.actions),
            "features": list(self.rule.features),
            "reject_action": self.rule.reject_action,
            "invalid_input": self.rule.invalid_input,
            "path": self.path,
            "loaded_at": self.loaded_at,
        }


def load_serving(path: str | os.PathLike[str]) -> Serving:
    """Load, verify and exercise an artefact; raise ArtefactError naming what is wrong.

    ``load_rule`` checks the format version, the content hash and the array shapes.
    On top of that the rule is run once on a probe row, so a rule that loads but
    cannot decide is caught here rather than on the first request.
    """
    absolute = os.path.abspath(os.fspath(path))
    try:
        status = os.stat(absolute)
    except OSError as exc:
        raise ArtefactError(f"{absolute}: cannot read: {exc.strerror}") from None
    if not stat.S_ISREG(status.st_mode):
        # a FIFO or a device would block or never end when read
        raise ArtefactError(f"{absolute}: not a regular file")
    rule = load_rule(absolute)
    try:
        probe = rule.assess(np.zeros((1, len(rule.features))))
    except Exception as exc:
        raise ArtefactError(f"{absolute}: the rule loads but fails on a probe row: {exc}") from exc
    if probe.action.shape != (1,) or not 0 <= int(probe.action[0]) < len(rule.actions):
        raise ArtefactError(f"{absolute}: the rule loads but returns no usable action on a probe row")
    return Serving(
        rule=rule,
        path=absolute,
        loaded_at=datetime.now(UTC).isoformat(timespec="seconds"),
        feature_index=MappingProxyType({name: j for j, name in enumerate(rule.features)}),
    )


class RuleSlot:
    """The single reference to the serving rule.

    Readers use :attr:`current` once per request. :meth:`reload` loads and
    verifies first and assigns last; reloads are serialised by a lock so that
    two of them cannot race to decide which one wins.
    """

    def __init__(self, serving: Serving) -> None:
        self._current = serving
        self._reload_lock = threading.Lock()
        self.reloads = 0

    @property
    def current(self) -> Serving:
        return self._current

    def reload(self, path: str | None = None, allow_feature_change: bool = False) -> tuple[Serving, Serving]:
        """Swap in the artefact at ``path`` (default: the path of the rule being served).

        Returns (previous, new). Raises ArtefactError or ReloadRefused and then
        leaves the serving rule untouched.
        """
        with self._reload_lock:
            previous = self._current
            candidate = load_serving(previous.path if path is None else path)
            if candidate.rule.features != previous.rule.features and not allow_feature_change:
                raise ReloadRefused(
                    f"{candidate.path}: the rule takes features {list(candidate.rule.features)}, the one being "
                    f"served takes {list(previous.rule.features)}; callers would break. Send "
                    '"allow_feature_change": true to swap it in anyway'
                )
            self._current = candidate  # the swap: one reference assignment
            self.reloads += 1
            return previous, candidate


# ---------------------------------------------------------------- request parsing


async def _read_body(request: Request, limit: int) -> bytes:
    declared = request.headers.get("content-length")
    if declared is not None:
        try:
            declared_size = int(declared)
        except ValueError:
            raise RequestProblem(400, "bad-content-length", "the Content-Length header is not a number") from None
        if declared_size > limit:
            raise RequestProblem(413, "body-too-large", f"the request body is over {limit} bytes")
    chunks: list[bytes] = []
    size = 0
    async for chunk in request.stream():
        size += len(chunk)
        if size > limit:
            raise RequestProblem(413, "body-too-large", f"the request body is over {limit} bytes")
        chunks.append(chunk)
    return b"".join(chunks)


def _parse_json(body: bytes) -> Any:
    try:
        return json.loads(body)
    except (ValueError, RecursionError) as exc:  # JSONDecodeError and UnicodeDecodeError are ValueErrors
        detail = str(exc) if isinstance(exc, ValueError) else "nested too deeply"
        raise RequestProblem(400, "invalid-json", f"the request body is not valid JSON: {detail}") from None


def _parse_decide_request(payload: Any, max_records: int) -> tuple[list[Any], bool, bool]:
    """Return (records, single, explain) from the request envelope, or raise a 400/413."""
    if not isinstance(payload, dict):
        raise RequestProblem(
            400, "bad-request-shape", 'the request body must be a JSON object with "record" or "records"'
        )
    unknown = sorted(set(payload) - _DECIDE_KEYS)
    if unknown:
        raise RequestProblem(
            400,
            "unknown-request-key",
            f"unknown key(s) {unknown} in the request; allowed: {sorted(_DECIDE_KEYS)}",
        )
    explain = payload.get("explain", False)
    if not isinstance(explain, bool):
        raise RequestProblem(400, "bad-request-shape", f'"explain" must be true or false, got {explain!r}')
    if ("record" in payload) == ("records" in payload):
        raise RequestProblem(
            400, "bad-request-shape", 'give exactly one of "record" (one object) or "records" (a list of objects)'
        )
    if "record" in payload:
        return [payload["record"]], True, explain
    records = payload["records"]
    if not isinstance(records, list):
        raise RequestProblem(400, "bad-request-shape", '"records" must be a list of objects')
    if len(records) > max_records:
        raise RequestProblem(
            413, "too-many-records", f"{len(records)} records in one request; at most {max_records} are accepted"
        )
    return records, False, explain


def _where(index: int, single: bool) -> str:
    return "record" if single else f"records[{index}]"


def _rows(serving: Serving, records: Sequence[Any], single: bool) -> np.ndarray:
    """Validate the records against the rule's features and return them as an (n, d) float array.

    Non-finite values are refused here, before the rule sees them, whatever the
    rule's ``invalid_input`` says. JSON (RFC 8259) has no NaN or infinity; Python's
    parser still accepts the tokens NaN and Infinity and turns 1e999 into inf, so a
    non-finite value on the wire is an encoding fault or a missing measurement
    smuggled in by the caller. Answering it with the rule's reject action (say
    hold_for_inspector) would dress a client bug up as a plausible decision, so the
    caller gets a 422 naming the record and field instead and can route a missing
    measurement deliberately. Rows that are finite but that the rule still finds
    invalid (values so extreme that the evidence overflows) do follow the rule's
    policy: the reject action under ``reject``, a 422 under ``error``.
    """
    features = serving.rule.features
    index = serving.feature_index
    rows = np.empty((len(records), len(features)), dtype=np.float64)
    problems: list[dict[str, Any]] = []
    count = 0

    def problem(i: int, name: str | None, code: str, message: str) -> None:
        nonlocal count
        count += 1
        if len(problems) < MAX_REPORTED_PROBLEMS:
            where = _where(i, single) + (f".{name}" if name is not None else "")
            problems.append({"record": i, "field": name, "code": code, "message": f"{where}: {message}"})

    for i, record in enumerate(records):
        if not isinstance(record, dict):
            problem(i, None, "record-not-an-object", f"expected an object of feature values, got {_kind(record)}")
            continue
        for name in features:
            if name not in record:
                problem(i, name, "missing-feature", f"missing feature; the rule needs {', '.join(features)}")
        for name, value in record.items():
            j = index.get(name)
            if j is None:
                problem(i, name, "unknown-field", f"not a feature of this rule; it takes {', '.join(features)}")
                continue
            if isinstance(value, bool) or not isinstance(value, int | float):
                problem(i, name, "not-a-number", f"must be a number, got {_kind(value)} {_short(value)}")
                continue
            try:
                number = float(value)
            except OverflowError:  # an integer literal too large for a float
                number = math.inf
            if not math.isfinite(number):
                problem(i, name, "non-finite-value", f"must be a finite number, got {_short(value)}")
                continue
            rows[i, j] = number
    if count:
        raise _unprocessable(problems, count)
    return rows


def _unprocessable(problems: list[dict[str, Any]], count: int) -> RequestProblem:
    more = f" (and {count - 1} more problem(s))" if count > 1 else ""
    first = problems[0]
    return RequestProblem(
        422,
        "invalid-records",
        first["message"] + more,
        record=first["record"],
        field=first["field"],
        problems=problems,
        problem_count=count,
    )


def _kind(value: Any) -> str:
    return {
        dict: "an object",
        list: "a list",
        str: "a string",
        bool: "a boolean",
        type(None): "null",
    }.get(type(value), type(value).__name__)


def _short(value: Any) -> str:
    text = json.dumps(value) if not isinstance(value, float) else repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


# ---------------------------------------------------------------- deciding


def _decide(serving: Serving, body: bytes, max_records: int) -> dict[str, Any]:
    """Everything POST /decide does after the body is read; runs in a worker thread."""
    records, single, explain = _parse_decide_request(_parse_json(body), max_records)
    rows = _rows(serving, records, single)
    rule = serving.rule
    if rows.shape[0] == 0:
        return {"rule": serving.identity(), "actions": [], **({"explanations": []} if explain else {})}
    # assess never raises on invalid rows; the rule's invalid_input decides what they mean. Rows whose
    # evidence overflows are marked invalid, so numpy's floating-point warnings would only be log noise.
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        explanation = rule.assess(rows)
    if rule.invalid_input == "error" and not explanation.valid.all():
        bad = np.flatnonzero(~explanation.valid).tolist()
        problems = [
            {
                "record": i,
                "field": None,
                "code": "invalid-evidence",
                "message": f"{_where(i, single)}: the rule cannot evaluate this record (its evidence is invalid "
                "or overflows) and its policy is invalid_input: error",
            }
            for i in bad[:MAX_REPORTED_PROBLEMS]
        ]
        raise _unprocessable(problems, len(bad))
    actions = [rule.actions[k] for k in explanation.action.tolist()]
    response: dict[str, Any] = {"rule": serving.identity()}
    if single:
        response["action"] = actions[0]
    else:
        response["actions"] = actions
    if explain:
        details = _explanations(rule, explanation)
        if single:
            response["explanation"] = details[0]
        else:
            response["explanations"] = details
    return response


def _explanations(rule: Rule, explanation: Explanation) -> list[dict[str, Any]]:
    posteriors = explanation.posteriors.tolist()
    risks = explanation.risks.tolist()
    runner_up = explanation.runner_up.tolist()
    margin = explanation.margin.tolist()
    reasons = explanation.reason.tolist()  # min-risk, novelty or invalid: every deferral says why
    out = []
    for i, valid in enumerate(explanation.valid.tolist()):
        if not valid:  # sent to the reject action under invalid_input: reject; nothing finite to show
            out.append(
                {
                    "valid": False,
                    "reason": reasons[i],
                    "posteriors": None,
                    "risks": None,
                    "runner_up": None,
                    "margin": None,
                }
            )
            continue
        out.append(
            {
                "valid": True,
                "reason": reasons[i],
                "posteriors": dict(zip(rule.classes, posteriors[i], strict=True)),
                "risks": dict(zip(rule.actions, risks[i], strict=True)),
                "runner_up": rule.actions[runner_up[i]] if runner_up[i] >= 0 else None,
                "margin": margin[i],
            }
        )
    return out


# ---------------------------------------------------------------- endpoints


def _parse_reload_request(body: bytes) -> tuple[str | None, bool]:
    """Return (rule file name or None for the serving file, allow_feature_change), or raise a 400."""
    if not body.strip():
        return None, False
    payload = _parse_json(body)
    if not isinstance(payload, dict):
        raise RequestProblem(400, "bad-request-shape", "the reload body must be empty or a JSON object")
    unknown = sorted(set(payload) - _RELOAD_KEYS)
    if unknown:
        raise RequestProblem(
            400, "unknown-request-key", f"unknown key(s) {unknown} in the request; allowed: {sorted(_RELOAD_KEYS)}"
        )
    name = payload.get("rule")
    if name is not None and (not isinstance(name, str) or not RULE_FILE_NAME.match(name)):
        raise RequestProblem(
            400,
            "bad-rule-name",
            '"rule" must be the file name of a rule in the rules directory: letters, digits and _.-, '
            "no path separator, not starting with a dot",
        )
    allow = payload.get("allow_feature_change", False)
    if not isinstance(allow, bool):
        raise RequestProblem(400, "bad-request-shape", '"allow_feature_change" must be true or false')
    return name, allow


def _authorise_reload(request: Request, token: str | None) -> None:
    """A configured token is always required; without one, only loopback clients may reload."""
    if token is None:
        if not is_loopback(request.client.host if request.client else None):
            raise RequestProblem(
                403, "reload-needs-token", "reloading from another host needs the service to be started with a token"
            )
        return
    supplied = request.headers.get("authorization", "").encode("utf-8", "surrogateescape")
    if not hmac.compare_digest(supplied, f"Bearer {token}".encode()):  # constant time: no guessing by timing
        raise RequestProblem(401, "unauthorized", "reload needs the service's token: Authorization: Bearer <token>")


def create_app(
    rule_path: str | os.PathLike[str],
    *,
    max_records: int = MAX_RECORDS,
    max_body_bytes: int = MAX_BODY_BYTES,
    enable_admin: bool = True,
    rules_dir: str | os.PathLike[str] | None = None,
    reload_token: str | None = None,
) -> Starlette:
    """Load the rule at ``rule_path`` and return the application serving it.

    ``POST /admin/reload`` loads rule files by name from ``rules_dir`` only (default: the directory of
    ``rule_path``). With ``reload_token`` it needs ``Authorization: Bearer <token>``; without one it
    answers loopback clients only.

    Raises StartupError, with the reason, when the artefact cannot be served or the rules directory is
    not a directory: the service never starts without a verified rule. The slot holding the rule is
    ``app.state.rule_slot``.
    """
    try:
        slot = RuleSlot(load_serving(rule_path))
    except ArtefactError as exc:
        raise StartupError(f"refusing to start: {exc}") from None
    directory = os.path.realpath(os.fspath(rules_dir) if rules_dir is not None else os.path.dirname(slot.current.path))
    if not os.path.isdir(directory):
        raise StartupError(f"refusing to start: the rules directory {directory} is not a directory")
    if reload_token is not None and not reload_token.strip():
        raise StartupError("refusing to start: the reload token is empty")
    log.info("serving %s from %s", slot.current.identity(), slot.current.path)

    async def decide(request: Request) -> Response:
        serving = slot.current  # taken once: this request is decided by this rule whatever reloads happen
        body = await _read_body(request, max_body_bytes)
        return JSONResponse(await run_in_threadpool(_decide, serving, body, max_records))

    async def health(request: Request) -> Response:
        serving = slot.current
        return JSONResponse({"status": "ok", "rule": serving.description(), "reloads": slot.reloads})

    def reload_named(name: str | None, allow_feature_change: bool) -> tuple[Serving, Serving]:
        path = None if name is None else rule_in_directory(directory, name)
        return slot.reload(path, allow_feature_change)

    async def reload(request: Request) -> Response:
        _authorise_reload(request, reload_token)
        name, allow_feature_change = _parse_reload_request(await _read_body(request, 64 * 1024))
        try:
            previous, new = await run_in_threadpool(reload_named, name, allow_feature_change)
        except RuleNotAvailable:
            message = f"no readable rule file named {name!r} in the rules directory"
            return _reload_failed(404, "rule-not-found", message, slot)
        except ReloadRefused as exc:
            return _reload_failed(409, "reload-refused", str(exc), slot)
        except ArtefactError as exc:
            return _reload_failed(422, "reload-failed", str(exc), slot)
        except Exception as exc:  # keep serving whatever went wrong; say what it was
            log.exception("reload failed unexpectedly")
            return _reload_failed(500, "reload-failed", f"{type(exc).__name__}: {exc}", slot)
        changed = new.rule.content_sha256 != previous.rule.content_sha256
        log.info("reloaded %s from %s (changed: %s)", new.identity(), new.path, changed)
        return JSONResponse(
            {"reloaded": True, "changed": changed, "previous": previous.identity(), "rule": new.description()}
        )

    routes = [
        Route("/decide", decide, methods=["POST"]),
        Route("/health", health, methods=["GET"]),
    ]
    if enable_admin:
        routes.append(Route("/admin/reload", reload, methods=["POST"]))
    app = Starlette(
        routes=routes,
        exception_handlers={
            RequestProblem: _request_problem,
            HTTPException: _http_exception,
            Exception: _internal_error,
        },
    )
    app.state.rule_slot = slot
    return app


def _reload_failed(status: int, code: str, message: str, slot: RuleSlot) -> Response:
    log.warning("reload refused: %s", message)
    return JSONResponse(
        {"error": code, "message": f"{message}; still serving the previous rule", "rule": slot.current.identity()},
        status_code=status,
    )


async def _request_problem(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, RequestProblem)
    return JSONResponse(exc.body(), status_code=exc.status)


async def _http_exception(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, HTTPException)
    try:
        code = HTTPStatus(exc.status_code).phrase.lower().replace(" ", "-")
    except ValueError:
        code = f"http-{exc.status_code}"
    return JSONResponse({"error": code, "message": exc.detail}, status_code=exc.status_code, headers=exc.headers)


async def _internal_error(request: Request, exc: Exception) -> Response:
    return JSONResponse({"error": "internal-error", "message": "the service failed on this request"}, status_code=500)
