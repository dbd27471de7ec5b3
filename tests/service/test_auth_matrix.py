"""Security: the auth matrix over every documented operation, tokens kept hashed and
out of every log and file, constant-time token comparison, formula-safe CSV.

The list of operations comes from the app's own OpenAPI document, so a new
endpoint is in the matrix the day it is documented (and test_api already
fails a route that is not documented). Operations the document marks
``security: []`` must be in PUBLIC, the short list of deliberate exceptions.
"""
from __future__ import annotations

import ast
import csv
import hashlib
import io
import json
import re
from pathlib import Path

import pytest

from conftest import (
    ROOT, clean_env, csv_batch, isotherm, json_batch, start_redis, start_server, start_worker,
    wait_until,
)
from sorbrank.service.app import create_app
from sorbrank.service.auth import parse_tokens
from sorbrank.service.config import Settings
from sorbrank.worker import jobs
from sorbrank.worker.store import Store

# tokens of this module (the secrets never leave the test; the app gets their hashes)
SECRETS = {"only-submit": ("am-submit-5e1c0b7d9f", ["submit"]),
           "only-read": ("am-read-a8f2c4e61b", ["read"]),
           "admin": ("am-admin-3d7e9a0c52", ["admin"])}
# documented exceptions: probes, the API description, the stylesheet, the metrics scrape
PUBLIC = {("get", "/healthz"), ("get", "/readyz"), ("get", "/api/v1/openapi.json"),
          ("get", "/assets/{filename}"), ("get", "/metrics")}
HTML_PATHS = ("/", "/sorbents/{sorbent_id}")


def tokens_config() -> str:
    return json.dumps([{"name": name, "sha256": hashlib.sha256(secret.encode()).hexdigest(),
                        "scopes": scopes} for name, (secret, scopes) in SECRETS.items()])


def bearer(who: str) -> dict:
    return {"Authorization": f"Bearer {SECRETS[who][0]}"}


@pytest.fixture(scope="module")
def app(tmp_path_factory):
    data = tmp_path_factory.mktemp("auth") / "data"
    settings = Settings(data_dir=data, chunk_size=2, embedded_workers=1,
                        tokens=tuple(parse_tokens(tokens_config(), "test")))
    store = Store(data)
    application = create_app(settings, enqueue=lambda b, c: jobs.execute_chunk(store, b, c))
    application.testing = True
    return application


@pytest.fixture(scope="module")
def client(app):
    return app.test_client()


@pytest.fixture(scope="module")
def known(client) -> dict:
    """Real ids, so that a request with the right scope reaches real data."""
    body = json_batch([dict(isotherm("AM-1", 2.0, 0.1), isotherm_id="AM-1-iso"),
                       dict(isotherm("AM-1", 1.2, 0.3, temperature_k=273.15),
                            isotherm_id="AM-1-iso-273")])
    resp = client.post("/api/v1/batches", data=body,
                       headers={"Content-Type": "application/json", **bearer("admin")})
    assert resp.status_code == 202, resp.get_data(as_text=True)
    return {"batch_id": resp.json["batch_id"], "sorbent_id": "AM-1",
            "isotherm_id": "AM-1-iso", "filename": "sorbrank.css"}


def operations(client) -> list[tuple[str, str, list[str]]]:
    """(method, path template, scopes required) for every documented operation."""
    doc = client.get("/api/v1/openapi.json").get_json()
    default = doc.get("security", [])
    ops = []
    for path, item in doc["paths"].items():
        for method, op in item.items():
            if method not in ("get", "post", "put", "patch", "delete"):
                continue
            security = op.get("security", default)
            scopes = sorted({s for requirement in security for s in requirement.get("bearer", [])})
            if not security:
                assert (method, path) in PUBLIC, f"{method.upper()} {path} is documented as " \
                                                 "open but is not a known public endpoint"
            else:
                assert scopes, f"{method.upper()} {path}: a bearer requirement without scope"
            ops.append((method, path, scopes if security else []))
    return ops


def call(client, method: str, template: str, known: dict, headers: dict, query: str = ""):
    path = re.sub(r"\{(\w+)\}", lambda m: known[m.group(1)], template) + query
    kwargs = {"headers": dict(headers)}
    if method == "post":
        kwargs["data"] = csv_batch([isotherm("AM-POST", 1.5, 0.1)])
        kwargs["headers"]["Content-Type"] = "text/csv"
    return client.open(path, method=method.upper(), **kwargs)


def test_auth_matrix_over_every_documented_operation(client, known):
    ops = operations(client)
    protected = [op for op in ops if op[2]]
    assert len(protected) >= 11 and {op[:2] for op in ops if not op[2]} <= PUBLIC
    admin_hash = hashlib.sha256(SECRETS["admin"][0].encode()).hexdigest()
    refused = {
        "no token": {},
        "unknown token": {"Authorization": "Bearer am-not-a-token"},
        "empty bearer": {"Authorization": "Bearer "},
        "the stored hash sent as the token": {"Authorization": f"Bearer {admin_hash}"},
        "another scheme": {"Authorization": f"Basic {SECRETS['admin'][0]}"},
        "token without scheme": {"Authorization": SECRETS["admin"][0]},
        "token with a suffix": {"Authorization": f"Bearer {SECRETS['admin'][0]}x"},
        "token truncated": {"Authorization": f"Bearer {SECRETS['admin'][0][:-1]}"},
    }
    tried = 0
    for method, path, scopes in protected:
        label = f"{method.upper()} {path}"
        html = path in HTML_PATHS
        for case, headers in refused.items():
            resp = call(client, method, path, known, headers)
            tried += 1
            assert resp.status_code == 401, (label, case, resp.status_code)
            assert resp.headers["WWW-Authenticate"].startswith("Bearer"), (label, case)
            assert resp.mimetype == ("text/html" if html else "application/problem+json")
        # a token in the query string is no credential
        resp = call(client, method, path, known, {}, f"?access_token={SECRETS['admin'][0]}")
        tried += 1
        assert resp.status_code == 401, (label, "query token")

        (needed,) = scopes
        wrong = "only-read" if needed == "submit" else "only-submit"
        resp = call(client, method, path, known, bearer(wrong))
        tried += 1
        assert resp.status_code == 403, (label, wrong, resp.status_code)
        if not html:
            assert resp.get_json()["required_scope"] == needed
        for who in (f"only-{needed}", "admin"):
            resp = call(client, method, path, known, bearer(who))
            tried += 1
            assert resp.status_code in (200, 202), (label, who, resp.status_code,
                                                    resp.get_data(as_text=True)[:300])
    for method, path, _ in (op for op in ops if not op[2]):
        resp = call(client, method, path, known, {})
        tried += 1
        assert resp.status_code == 200, (method, path, resp.status_code)
    print(f"\nauth matrix: {len(ops)} operations ({len(protected)} protected), {tried} requests")


def test_token_comparison_is_constant_time_inspection():
    """Inspection test: the token check hashes the presented secret and compares it to
    every configured hash with hmac.compare_digest, with no early exit from the loop and
    no == / != on digests anywhere in the service."""
    source = (ROOT / "service" / "auth.py").read_text()
    tree = ast.parse(source)
    identify = next(n for n in ast.walk(tree)
                    if isinstance(n, ast.FunctionDef) and n.name == "identify")
    calls = [ast.unparse(n.func) for n in ast.walk(identify) if isinstance(n, ast.Call)]
    assert "hmac.compare_digest" in calls and "hash_token" in calls
    loops = [n for n in ast.walk(identify) if isinstance(n, ast.For)]
    assert loops, "identify must look at every configured token"
    for loop in loops:
        exits = [n for n in ast.walk(loop) if isinstance(n, (ast.Break, ast.Return))]
        assert not exits, "an early exit makes the time depend on which token matched"
    for path in (ROOT / "service").rglob("*.py"):
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.Compare) and any(isinstance(o, (ast.Eq, ast.NotEq))
                                                     for o in node.ops):
                if any(isinstance(side, ast.Constant) for side in [node.left, *node.comparators]):
                    continue  # e.g. len(digest) != 64: configuration checks, no secret
                text = ast.unparse(node)
                assert "sha256" not in text and "digest" not in text, f"{path}: {text}"


def test_csv_exports_neutralise_formula_cells(client):
    # ids a spreadsheet would run are refused at intake (formula_start), so an export
    # never has to alter one; the batch label may still be hostile text
    evil_sorbents = ["=1+2", "+SUM(A1:A9)", "-2+3", "@HYPERLINK(x)", "=cmd|' -C calc'!A0"]
    isotherms = [dict(isotherm(m, 2.0 + i, 0.1), isotherm_id=f"ok-{i}")
                 for i, m in enumerate(evil_sorbents)]
    isotherms += [dict(isotherm("ok", 2.0 + i, 0.1), isotherm_id=f"=HYPERLINK(\"x{i}\")")
                  for i in range(2)]
    isotherms.append(isotherm("kept", 3.0, 0.1))
    body = json_batch(isotherms, label="=batch-label")
    resp = client.post("/api/v1/batches", data=body,
                       headers={"Content-Type": "application/json", **bearer("admin")})
    assert resp.status_code == 202 and resp.json["accepted"] == 1, resp.json
    assert [(i["code"], i["field"]) for i in resp.json["rejected"]] == \
        [("formula_start", "sorbent_id")] * 5 + [("formula_start", "isotherm_id")] * 2
    batch_id = resp.json["batch_id"]
    exports = {f"results {t}": f"/api/v1/batches/{batch_id}/results?format=csv&table={t}"
               for t in ("summary", "fits", "sorbents")}
    exports["rankings"] = f"/api/v1/rankings?format=csv&batch_id={batch_id}&all=true&limit=1000"
    seen_text = set()
    for name, url in exports.items():
        for headers in ({}, {"Accept": "text/csv"}):
            out = client.get(url.replace("format=csv&", "") if headers else url,
                             headers={**bearer("only-read"), **headers})
            assert out.status_code == 200 and out.mimetype == "text/csv", name
            rows = list(csv.reader(io.StringIO(out.get_data(as_text=True))))
            for row in rows:
                for cell in row:
                    if cell[:1] in ("=", "+", "-", "@", "\t", "\r"):
                        float(cell)  # only plain numbers may start so (a negative value)
                    seen_text.add(cell)
    assert "kept" in seen_text and not any("HYPERLINK" in cell for cell in seen_text)


def test_no_secret_in_store_broker_or_logs(tmp_path, processes):
    """Distributed mode with real processes and DEBUG logs: after requests carrying every
    kind of token (good, unknown, wrong scope, Idempotency-Key), no token and no
    Authorization header appears in any file under the data dir, in the API, worker or
    redis logs, or in anything Redis holds."""
    import redis
    import requests

    tokens_file = tmp_path / "tokens.json"
    tokens_file.write_text(tokens_config())
    logs = tmp_path / "logs"
    _, redis_url = start_redis(logs, processes)
    env = clean_env(SORBRANK_DATA_DIR=str(tmp_path / "data"), SORBRANK_CHUNK_SIZE="1",
                    SORBRANK_TOKENS_FILE=str(tokens_file), SORBRANK_BROKER_URL=redis_url,
                    SORBRANK_LOG_LEVEL="DEBUG", PYTHONPATH=str(ROOT))
    worker = start_worker(env, logs, processes, name="worker")
    server, url = start_server(env, logs, processes, name="server")
    api = url + "/api/v1"
    unknown = "am-never-configured-77aa"
    body = csv_batch([isotherm("SEC-1", 2.0, 0.1), isotherm("SEC-2", 3.0, 0.2)])
    resp = requests.post(f"{api}/batches", data=body, timeout=60, headers={
        "Content-Type": "text/csv", "Idempotency-Key": "sec-key-1", **bearer("only-submit")})
    assert resp.status_code == 202, resp.text
    batch_id = resp.json()["batch_id"]
    for headers in (bearer("only-read"), bearer("only-submit"), bearer("admin"),
                    {"Authorization": f"Bearer {unknown}"}, {"Authorization": f"Basic {unknown}"}):
        for path in (f"/batches/{batch_id}", f"/batches/{batch_id}/results", "/rankings"):
            assert requests.get(api + path, headers=headers, timeout=30).status_code < 500
    assert requests.post(f"{api}/batches", data=body, headers={
        "Content-Type": "text/csv", **bearer("only-read")}, timeout=30).status_code == 403

    def done():
        state = requests.get(f"{api}/batches/{batch_id}", headers=bearer("admin"),
                             timeout=30).json()["state"]
        return state if state in ("done", "failed", "partial") else None

    assert wait_until(done, "the batch to finish", [worker, server], timeout_s=120) == "done"
    for proc in (server, worker):
        proc.stop()

    secrets = [s for s, _ in SECRETS.values()] + [unknown]
    forbidden = [s.encode() for s in secrets] + [b"Authorization", b"Bearer "]
    haystacks: dict[str, bytes] = {}
    for path in Path(tmp_path / "data").rglob("*"):
        if path.is_file():
            haystacks[str(path)] = path.read_bytes()
    for proc in processes:
        haystacks[f"log of {proc.name}"] = proc.log.read_bytes()
    assert b"GET /api/v1/batches" in haystacks["log of server"]  # the request log is there
    assert b"chunk" in haystacks["log of worker"]
    r = redis.Redis.from_url(redis_url)
    for n, key in enumerate(r.scan_iter(count=100)):
        assert n < 10_000
        kind = r.type(key).decode()
        value = {"string": lambda: r.get(key), "list": lambda: b"".join(r.lrange(key, 0, -1)),
                 "hash": lambda: b"".join(k + v for k, v in r.hgetall(key).items()),
                 "set": lambda: b"".join(r.smembers(key)),
                 "zset": lambda: b"".join(r.zrange(key, 0, -1))}.get(kind, lambda: b"")()
        haystacks[f"redis key {key!r}"] = key + (value or b"")
    assert len(haystacks) > 10
    leaks = [(where, word) for where, text in haystacks.items() for word in forbidden
             if word in text]
    assert not leaks, leaks
