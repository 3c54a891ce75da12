"""The embedding example in policies-demo/service: a real uvicorn server on loopback, exercised over HTTP.

Rules are compiled once per module: the packhouse demo as it is (A) and a copy with a cheaper
inspector bench and a new revision (B), so the two decide some records differently. Each test
starts its own server in a background thread on a free loopback port and stops it afterwards.
"""

from __future__ import annotations

import asyncio
import csv
import importlib.util
import json
import math
import os
import shutil
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from types import ModuleType
from typing import Any

import httpx
import numpy as np
import pytest
import uvicorn
from helpers import read_csv_columns

from policyc.compiler.artefact import write_artefact
from policyc.compiler.build import compile_policy
from policyc.runtime import Rule, load_rule

ROOT = Path(__file__).resolve().parent.parent
SERVICE = ROOT / "policies-demo" / "service"
PACKHOUSE = ROOT / "policies-demo" / "packhouse"
START_TIMEOUT = 10.0


def _load_service_module() -> ModuleType:
    spec = importlib.util.spec_from_file_location("policyc_demo_service_app", SERVICE / "app.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)
    return module


service = _load_service_module()


@dataclass(frozen=True)
class Artefacts:
    a: Path
    b: Path
    corrupt: Path
    other_features: Path
    strict: Path
    rule_a: Rule
    rule_b: Rule

    @property
    def hash_a(self) -> str:
        return str(self.rule_a.content_sha256)

    @property
    def hash_b(self) -> str:
        return str(self.rule_b.content_sha256)


@pytest.fixture(scope="module")
def artefacts(tmp_path_factory: pytest.TempPathFactory) -> Artefacts:
    root = tmp_path_factory.mktemp("rules")
    a = root / "packhouse-a.rule"
    write_artefact(compile_policy(PACKHOUSE / "policy.yaml").rule, a)

    variant = root / "variant"
    variant.mkdir()
    shutil.copyfile(PACKHOUSE / "train.csv", variant / "train.csv")
    text = (PACKHOUSE / "policy.yaml").read_text(encoding="utf-8")
    changed = text.replace("revision: 3", "revision: 4").replace("cost: 2.5}", "cost: 1.2}")
    assert changed.count("revision: 4") == 1 and changed.count("cost: 1.2}") == 1, "the demo policy changed shape"
    (variant / "policy.yaml").write_text(changed, encoding="utf-8")
    b = root / "packhouse-b.rule"
    write_artefact(compile_policy(variant / "policy.yaml").rule, b)

    corrupt = root / "corrupt.rule"
    data = bytearray(a.read_bytes())
    data[len(data) // 2] ^= 0xFF
    corrupt.write_bytes(bytes(data))

    rule_a = load_rule(a)
    renamed = dict(rule_a.manifest)
    renamed["features"] = [f"{name}_v2" for name in rule_a.features]
    other_features = root / "other-features.rule"
    write_artefact(Rule(renamed, dict(rule_a.params)), other_features)

    strict = root / "strict.rule"
    write_artefact(Rule({**rule_a.manifest, "invalid_input": "error"}, dict(rule_a.params)), strict)

    return Artefacts(a, b, corrupt, other_features, strict, rule_a, load_rule(b))


@pytest.fixture(scope="module")
def holdout() -> list[dict[str, float]]:
    with (PACKHOUSE / "holdout.csv").open(newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    features = ("firmness_n", "blush_frac", "mass_g", "brix")
    return [{name: float(row[name]) for name in features} for row in rows]


def _matrix(rule: Rule, records: list[dict[str, float]]) -> np.ndarray:
    return np.array([[record[name] for name in rule.features] for record in records])


@contextmanager
def running(app: Any) -> Iterator[str]:
    """Serve ``app`` with uvicorn on 127.0.0.1 in a thread; yield the base URL; always stop it."""
    # proto must be IPPROTO_TCP: asyncio only sets TCP_NODELAY on accepted TCP sockets that say so,
    # and without it every keep-alive request waits out a delayed ACK (about 40 ms)
    listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM, socket.IPPROTO_TCP)
    listener.bind(("127.0.0.1", 0))
    port = listener.getsockname()[1]
    config = uvicorn.Config(app, log_config=None, log_level="warning", access_log=False, lifespan="off")
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, kwargs={"sockets": [listener]}, daemon=True)
    thread.start()
    try:
        deadline = time.monotonic() + START_TIMEOUT
        while not server.started:
            if not thread.is_alive():
                raise RuntimeError("the server thread ended during start-up")
            if time.monotonic() > deadline:
                raise RuntimeError(f"the server did not start within {START_TIMEOUT} s")
            time.sleep(0.01)
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=START_TIMEOUT)
        listener.close()
        assert not thread.is_alive(), "the server thread did not stop"


@dataclass
class Running:
    url: str
    client: httpx.Client
    rule_path: Path


RELOADABLE = ("a", "b", "corrupt", "other_features")


@pytest.fixture
def server(artefacts: Artefacts, tmp_path: Path) -> Iterator[Running]:
    """The service on rule A, with the test artefacts under their names in its rules directory (tmp_path)."""
    rule_path = tmp_path / "serving.rule"
    shutil.copyfile(artefacts.a, rule_path)
    for attribute in RELOADABLE:
        source = getattr(artefacts, attribute)
        shutil.copyfile(source, tmp_path / source.name)
    app = service.create_app(rule_path)
    with running(app) as url, httpx.Client(base_url=url, timeout=10.0) as client:
        yield Running(url, client, rule_path)


def _post_raw(client: httpx.Client, path: str, body: str | bytes) -> httpx.Response:
    return client.post(path, content=body, headers={"content-type": "application/json"})


# ---------------------------------------------------------------- decisions


def test_single_record_matches_decide_one(server: Running, artefacts: Artefacts, holdout: list[dict]) -> None:
    for record in holdout[:25]:
        response = server.client.post("/decide", json={"record": record})
        assert response.status_code == 200, response.text
        body = response.json()
        assert body["action"] == artefacts.rule_a.decide_one(record)
        assert body["rule"] == {"policy": "packhouse-grading", "revision": 3, "content_sha256": artefacts.hash_a}
        assert "explanation" not in body


def test_batch_matches_decide_names(server: Running, artefacts: Artefacts, holdout: list[dict]) -> None:
    response = server.client.post("/decide", json={"records": holdout})
    assert response.status_code == 200, response.text
    body = response.json()
    expected = artefacts.rule_a.decide_names(_matrix(artefacts.rule_a, holdout)).tolist()
    assert body["actions"] == expected
    assert len(set(expected)) > 1, "the holdout should exercise more than one action"
    assert body["rule"]["content_sha256"] == artefacts.hash_a


def test_explain_returns_posteriors_risks_runner_up_and_margin(
    server: Running, artefacts: Artefacts, holdout: list[dict]
) -> None:
    rule = artefacts.rule_a
    records = holdout[:50]
    body = server.client.post("/decide", json={"records": records, "explain": True}).json()
    reference = rule.explain(_matrix(rule, records))
    assert len(body["explanations"]) == len(records)
    for i, (action, details) in enumerate(zip(body["actions"], body["explanations"], strict=True)):
        assert details["valid"] is True
        assert list(details["posteriors"]) == list(rule.classes)
        assert math.isclose(sum(details["posteriors"].values()), 1.0, abs_tol=1e-9)
        assert list(details["risks"]) == list(rule.actions)
        np.testing.assert_allclose(list(details["posteriors"].values()), reference.posteriors[i], rtol=1e-12)
        np.testing.assert_allclose(list(details["risks"].values()), reference.risks[i], rtol=1e-12)
        assert details["runner_up"] == rule.actions[reference.runner_up[i]] != action
        assert details["margin"] >= 0.0
        assert details["risks"][details["runner_up"]] - details["risks"][action] == pytest.approx(details["margin"])

    # One record and the same record in a batch give the same decision; their numbers agree to rounding (BLAS
    # sums a one-row product in another order than a many-row one, so the last bits may differ).
    single = server.client.post("/decide", json={"record": records[0], "explain": True}).json()["explanation"]
    batched = body["explanations"][0]
    assert {k: v for k, v in single.items() if not isinstance(v, float | dict)} == {
        k: v for k, v in batched.items() if not isinstance(v, float | dict)
    }
    for key in ("posteriors", "risks"):
        assert list(single[key]) == list(batched[key])
        np.testing.assert_allclose(list(single[key].values()), list(batched[key].values()), rtol=1e-12)
    assert single["margin"] == pytest.approx(batched["margin"], rel=1e-12)


def test_extreme_finite_values_follow_the_rules_invalid_input_policy(server: Running, artefacts: Artefacts) -> None:
    # finite, but the gaussian evidence overflows: packhouse says invalid_input: reject
    record = {"firmness_n": 1e300, "blush_frac": 0.5, "mass_g": 180.0, "brix": 13.0}
    body = server.client.post("/decide", json={"record": record, "explain": True}).json()
    assert body["action"] == artefacts.rule_a.reject_action == artefacts.rule_a.decide_one(record)
    assert body["explanation"]["valid"] is False and body["explanation"]["posteriors"] is None


def test_rows_the_rule_cannot_evaluate_are_422_under_invalid_input_error(
    artefacts: Artefacts, holdout: list[dict]
) -> None:
    extreme = {**holdout[0], "firmness_n": 1e300}
    with running(service.create_app(artefacts.strict)) as url:
        response = httpx.post(f"{url}/decide", json={"records": [holdout[0], extreme]}, timeout=10.0)
    assert response.status_code == 422
    body = response.json()
    assert body["record"] == 1 and body["problems"][0]["code"] == "invalid-evidence"


def test_empty_batch_is_an_empty_answer(server: Running) -> None:
    response = server.client.post("/decide", json={"records": []})
    assert response.status_code == 200
    assert response.json()["actions"] == []


# ---------------------------------------------------------------- bad requests


def test_missing_feature_names_field_and_record(server: Running, holdout: list[dict]) -> None:
    incomplete = {k: v for k, v in holdout[1].items() if k != "brix"}
    response = server.client.post("/decide", json={"records": [holdout[0], incomplete]})
    assert response.status_code == 422
    body = response.json()
    assert body["error"] == "invalid-records"
    assert (body["record"], body["field"]) == (1, "brix")
    assert "records[1].brix" in body["message"] and "missing" in body["message"]
    assert body["problems"][0]["code"] == "missing-feature"


def test_unknown_field_and_non_numeric_values(server: Running, holdout: list[dict]) -> None:
    cases = [
        ({**holdout[0], "item_id": 7}, "item_id", "unknown-field"),
        ({**holdout[0], "mass_g": "185.2"}, "mass_g", "not-a-number"),
        ({**holdout[0], "mass_g": None}, "mass_g", "not-a-number"),
        ({**holdout[0], "brix": True}, "brix", "not-a-number"),
        ({**holdout[0], "brix": [1.0]}, "brix", "not-a-number"),
    ]
    for record, field, code in cases:
        response = server.client.post("/decide", json={"record": record})
        assert response.status_code == 422, record
        body = response.json()
        assert body["field"] == field and body["record"] == 0
        assert body["problems"][0]["code"] == code
        assert f"record.{field}" in body["message"]


def test_non_finite_values_are_refused_before_the_rule(server: Running) -> None:
    for literal in ("NaN", "Infinity", "-Infinity", "1e999", "1" + "0" * 400):
        raw = '{"record": {"firmness_n": 45.0, "blush_frac": 0.5, "mass_g": ' + literal + ', "brix": 13.0}}'
        response = _post_raw(server.client, "/decide", raw)
        assert response.status_code == 422, literal
        body = response.json()
        assert body["field"] == "mass_g"
        assert body["problems"][0]["code"] == "non-finite-value"


def test_invalid_json_and_wrong_shapes_are_400(server: Running, holdout: list[dict]) -> None:
    for raw in ('{"record": {', "", "\xff\xfe", "[" * 100_000 + "]" * 100_000):
        response = _post_raw(server.client, "/decide", raw.encode("latin-1"))
        assert response.status_code == 400, raw[:20]
        assert response.json()["error"] == "invalid-json"
    shapes: list[Any] = [
        [holdout[0]],
        {"record": holdout[0], "records": [holdout[0]]},
        {},
        {"records": holdout[0]},
        {"record": holdout[0], "explain": "yes"},
        {"record": holdout[0], "verbose": True},
    ]
    for shape in shapes:
        response = server.client.post("/decide", json=shape)
        assert response.status_code == 400, shape
        assert response.json()["error"] in {"bad-request-shape", "unknown-request-key"}
    response = server.client.post("/decide", json={"records": [holdout[0], 3.0]})
    assert response.status_code == 422
    assert response.json()["problems"][0]["code"] == "record-not-an-object"


def test_batch_size_is_capped(server: Running, holdout: list[dict]) -> None:
    response = server.client.post("/decide", json={"records": [holdout[0]] * (service.MAX_RECORDS + 1)})
    assert response.status_code == 413
    assert response.json()["error"] == "too-many-records"


def test_unknown_route_and_method_answer_json(server: Running) -> None:
    assert server.client.get("/nowhere").json()["error"] == "not-found"
    response = server.client.get("/decide")
    assert response.status_code == 405 and response.json()["error"] == "method-not-allowed"


# ---------------------------------------------------------------- health and reload


def test_health_names_the_rule(server: Running, artefacts: Artefacts) -> None:
    body = server.client.get("/health").json()
    assert body["status"] == "ok"
    assert body["rule"]["content_sha256"] == artefacts.hash_a
    assert body["rule"]["policy"] == "packhouse-grading" and body["rule"]["revision"] == 3
    assert body["rule"]["features"] == list(artefacts.rule_a.features)
    assert body["rule"]["path"] == str(server.rule_path)


def test_reload_switches_the_rule(server: Running, artefacts: Artefacts, holdout: list[dict]) -> None:
    response = server.client.post("/admin/reload", json={"rule": artefacts.b.name})
    assert response.status_code == 200, response.text
    body = response.json()
    assert body["changed"] is True
    assert body["previous"]["content_sha256"] == artefacts.hash_a
    assert body["rule"]["content_sha256"] == artefacts.hash_b and body["rule"]["revision"] == 4

    decided = server.client.post("/decide", json={"records": holdout}).json()
    assert decided["rule"]["content_sha256"] == artefacts.hash_b
    assert decided["actions"] == artefacts.rule_b.decide_names(_matrix(artefacts.rule_b, holdout)).tolist()
    assert server.client.get("/health").json()["reloads"] == 1


def test_reload_without_a_path_rereads_the_serving_file(server: Running, artefacts: Artefacts) -> None:
    unchanged = server.client.post("/admin/reload")
    assert unchanged.status_code == 200 and unchanged.json()["changed"] is False
    shutil.copyfile(artefacts.b, server.rule_path)
    response = server.client.post("/admin/reload")
    assert response.status_code == 200
    assert response.json()["rule"]["content_sha256"] == artefacts.hash_b


def test_failed_reloads_keep_the_old_rule(server: Running, artefacts: Artefacts, holdout: list[dict]) -> None:
    (server.rule_path.parent / "subdirectory").mkdir()
    failures = [
        ({"rule": artefacts.corrupt.name}, 422),
        ({"rule": "absent.rule"}, 404),
        ({"rule": "subdirectory"}, 404),
        ({"rule": artefacts.other_features.name}, 409),
        ({"rule": ""}, 400),
        ({"rule": artefacts.b.name, "force": True}, 400),
    ]
    for request, status in failures:
        response = server.client.post("/admin/reload", json=request)
        assert response.status_code == status, (request, response.text)
        body = response.json()
        assert body["message"]
        if status != 400:
            assert body["rule"]["content_sha256"] == artefacts.hash_a
        decided = server.client.post("/decide", json={"record": holdout[0]}).json()
        assert decided["rule"]["content_sha256"] == artefacts.hash_a
    assert "corrupt.rule" in server.client.post("/admin/reload", json=failures[0][0]).json()["message"]
    health = server.client.get("/health").json()
    assert health["rule"]["content_sha256"] == artefacts.hash_a and health["reloads"] == 0

    allowed = server.client.post(
        "/admin/reload", json={"rule": artefacts.other_features.name, "allow_feature_change": True}
    )
    assert allowed.status_code == 200
    assert allowed.json()["rule"]["features"][0].endswith("_v2")


@pytest.mark.parametrize(
    "name",
    ["/etc/passwd", "../packhouse-a.rule", "..", ".", ".hidden.rule", "sub/x.rule", "sub\\x.rule", "x\x00.rule", 7],
)
def test_reload_takes_a_rule_file_name_never_a_path(server: Running, artefacts: Artefacts, name: object) -> None:
    # Reload used to load any path on the server.
    response = server.client.post("/admin/reload", json={"rule": name})
    assert response.status_code == 400 and response.json()["error"] == "bad-rule-name"
    response = server.client.post("/admin/reload", json={"path": str(artefacts.b)})
    assert response.status_code == 400 and response.json()["error"] == "unknown-request-key"
    assert server.client.get("/health").json()["rule"]["content_sha256"] == artefacts.hash_a


def test_missing_and_unreadable_rule_files_get_the_same_answer(
    server: Running, artefacts: Artefacts, tmp_path_factory: pytest.TempPathFactory
) -> None:
    # The messages used to tell a missing file from an unreadable one, so reload probed the server's files.
    rules = server.rule_path.parent
    outside = tmp_path_factory.mktemp("outside") / "elsewhere.rule"
    shutil.copyfile(artefacts.b, outside)
    (rules / "link-out.rule").symlink_to(outside)  # a valid rule, but outside the rules directory
    (rules / "dangling.rule").symlink_to(rules / "nowhere.rule")
    (rules / "directory.rule").mkdir()
    os.mkfifo(rules / "fifo.rule")
    unreadable = ["link-out.rule", "dangling.rule", "directory.rule", "fifo.rule"]
    if os.geteuid() != 0:  # permissions do not stop root
        shutil.copyfile(artefacts.b, rules / "locked.rule")
        (rules / "locked.rule").chmod(0)
        unreadable.append("locked.rule")
    missing = server.client.post("/admin/reload", json={"rule": "absent.rule"})
    for name in unreadable:
        response = server.client.post("/admin/reload", json={"rule": name})
        assert response.status_code == missing.status_code == 404, name
        assert response.json() == {**missing.json(), "message": missing.json()["message"].replace("absent.rule", name)}
    assert server.client.get("/health").json()["reloads"] == 0


def test_reload_needs_the_token_when_one_is_configured(artefacts: Artefacts, holdout: list[dict]) -> None:
    app = service.create_app(artefacts.a, reload_token="correct horse")
    with running(app) as url, httpx.Client(base_url=url, timeout=10.0) as client:
        for headers in ({}, {"Authorization": "Bearer wrong"}, {"Authorization": "correct horse"}):
            response = client.post("/admin/reload", json={"rule": artefacts.b.name}, headers=headers)
            assert response.status_code == 401 and response.json()["error"] == "unauthorized", headers
        assert client.post("/decide", json={"record": holdout[0]}).status_code == 200  # deciding needs no token
        response = client.post(
            "/admin/reload", json={"rule": artefacts.b.name}, headers={"Authorization": "Bearer correct horse"}
        )
        assert response.status_code == 200 and response.json()["rule"]["content_sha256"] == artefacts.hash_b


def test_reload_without_a_token_answers_loopback_clients_only(artefacts: Artefacts) -> None:
    app = service.create_app(artefacts.a)

    async def reload_from(address: str) -> httpx.Response:
        transport = httpx.ASGITransport(app=app, client=(address, 40000))
        async with httpx.AsyncClient(transport=transport, base_url="http://service") as client:
            return await client.post("/admin/reload")

    for address in ("10.1.2.3", "192.168.0.7", "2001:db8::1"):
        response = asyncio.run(reload_from(address))
        assert response.status_code == 403 and response.json()["error"] == "reload-needs-token", address
    for address in ("127.0.0.1", "::1"):
        assert asyncio.run(reload_from(address)).status_code == 200, address


def test_serve_script_needs_a_token_to_offer_reload_beyond_loopback(artefacts: Artefacts) -> None:
    script = str(SERVICE / "serve.py")
    environment = {key: value for key, value in os.environ.items() if key != "POLICYC_RELOAD_TOKEN"}
    refused = subprocess.run(
        [sys.executable, script, "--rule", str(artefacts.a), "--host", "0.0.0.0", "--port", str(_free_port())],
        capture_output=True,
        text=True,
        timeout=30,
        env=environment,
    )
    assert refused.returncode == 2
    assert "POLICYC_RELOAD_TOKEN" in refused.stderr and "--no-admin" in refused.stderr


def test_reloading_under_load_drops_no_request(server: Running, artefacts: Artefacts, holdout: list[dict]) -> None:
    names_a = artefacts.rule_a.decide_names(_matrix(artefacts.rule_a, holdout))
    names_b = artefacts.rule_b.decide_names(_matrix(artefacts.rule_b, holdout))
    differing = [holdout[i] for i in np.flatnonzero(names_a != names_b)[:8]]
    assert differing, "rules A and B should disagree on some holdout records"
    expected = {
        artefacts.hash_a: artefacts.rule_a.decide_names(_matrix(artefacts.rule_a, differing)).tolist(),
        artefacts.hash_b: artefacts.rule_b.decide_names(_matrix(artefacts.rule_b, differing)).tolist(),
    }
    results: list[tuple[int, str | None, bool]] = []
    lock = threading.Lock()

    def hammer() -> None:
        with httpx.Client(base_url=server.url, timeout=10.0) as client:
            for _ in range(100):
                try:
                    response = client.post("/decide", json={"records": differing})
                except httpx.HTTPError:
                    outcome: tuple[int, str | None, bool] = (-1, None, False)
                else:
                    body = response.json() if response.status_code == 200 else {}
                    sha = body.get("rule", {}).get("content_sha256")
                    outcome = (response.status_code, sha, expected.get(sha) == body.get("actions"))
                with lock:
                    results.append(outcome)

    workers = [threading.Thread(target=hammer) for _ in range(4)]
    for worker in workers:
        worker.start()
    reloads = 0
    deadline = time.monotonic() + 15.0
    while any(worker.is_alive() for worker in workers) and time.monotonic() < deadline:
        target = artefacts.b if reloads % 2 == 0 else artefacts.a
        assert server.client.post("/admin/reload", json={"rule": target.name}).status_code == 200
        reloads += 1
        time.sleep(0.01)
    for worker in workers:
        worker.join(timeout=15.0)
    assert not any(worker.is_alive() for worker in workers)

    assert len(results) == 400
    assert reloads >= 2
    assert all(status == 200 for status, _, _ in results)
    assert {sha for _, sha, _ in results} <= {artefacts.hash_a, artefacts.hash_b}
    assert len({sha for _, sha, _ in results}) == 2, "both rules should have served during the reloads"
    # each answer was decided entirely by the rule it names
    assert all(consistent for _, _, consistent in results)


# ---------------------------------------------------------------- start-up


def test_create_app_refuses_a_bad_artefact(artefacts: Artefacts, tmp_path: Path) -> None:
    with pytest.raises(service.StartupError, match=r"refusing to start.*corrupt\.rule"):
        service.create_app(artefacts.corrupt)
    with pytest.raises(service.StartupError, match="cannot read"):
        service.create_app(tmp_path / "absent.rule")


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def test_serve_script_starts_and_refuses(artefacts: Artefacts) -> None:
    script = str(SERVICE / "serve.py")
    refused = subprocess.run(
        [sys.executable, script, "--rule", str(artefacts.corrupt), "--port", str(_free_port())],
        capture_output=True,
        text=True,
        timeout=30,
    )
    assert refused.returncode == 1
    assert "refusing to start" in refused.stderr and "corrupt.rule" in refused.stderr

    port = _free_port()
    process = subprocess.Popen(
        [sys.executable, script, "--rule", str(artefacts.a), "--port", str(port), "--log-level", "warning"],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
    )
    try:
        deadline = time.monotonic() + 15.0
        health = None
        while health is None:
            assert process.poll() is None, process.stderr.read().decode() if process.stderr else ""
            assert time.monotonic() < deadline, "serve.py did not start in time"
            try:
                health = httpx.get(f"http://127.0.0.1:{port}/health", timeout=1.0).json()
            except httpx.HTTPError:
                time.sleep(0.05)
        assert health["rule"]["content_sha256"] == artefacts.hash_a
    finally:
        process.terminate()
        try:
            process.wait(timeout=10)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=10)
        if process.stderr:
            process.stderr.close()


def test_service_imports_the_runtime_only() -> None:
    probe = (
        "import importlib.util, json, sys\n"
        f"spec = importlib.util.spec_from_file_location('service_app', {str(SERVICE / 'app.py')!r})\n"
        "module = importlib.util.module_from_spec(spec); sys.modules['service_app'] = module\n"
        "spec.loader.exec_module(module)\n"
        "print(json.dumps(sorted(m for m in sys.modules if m.split('.')[0] in "
        "('policyc', 'scipy', 'pydantic', 'pyarrow', 'click', 'yaml'))))\n"
    )
    result = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=30, check=True)
    loaded = json.loads(result.stdout)
    assert all(name == "policyc" or name.startswith("policyc.runtime") for name in loaded), loaded


def test_explanations_say_why_a_row_was_deferred_novelty_included() -> None:
    # packhouse r5 defers rows outside every class's 99.9% region (reason novelty); NaN rows are invalid
    app = _load_service_module()
    rule = compile_policy(PACKHOUSE / "policy-r5.yaml").rule
    far = np.full((2, len(rule.features)), 400.0)
    far[1, 0] = np.nan
    near = read_csv_columns(PACKHOUSE / "incoming.csv", rule.features)[:3]
    explanations = app._explanations(rule, rule.assess(np.vstack([near, far])))
    assert [e["reason"] for e in explanations[3:]] == ["novelty", "invalid"]
    assert {e["reason"] for e in explanations[:3]} <= {"min-risk", "novelty"}
    assert explanations[3]["valid"] is True and explanations[4]["valid"] is False
