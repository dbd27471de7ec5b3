"""Hostile and malformed input: nothing a client sends gets a 5xx.

Property-based bodies (random and half-valid CSV, JSON and Parquet, random
bytes) go to POST /api/v1/batches through ``app.test_client()``, which runs
the same WSGI application as ``sorbrank serve``; a schemathesis run drives
every operation of the app's own OpenAPI document; and the cases that only a
real socket can show (a Content-Length far over the limit, a chunked body
that never ends, raw ``..`` in URLs) go to a real ``sorbrank serve`` process.
Every answer must be < 500; errors must be problem documents whose issues
name the batch (and isotherm, row, field where they apply); nothing may be
written outside the store.
"""
from __future__ import annotations

import collections
import http.client
import io
import json
import math
import os
import select
import socket
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import schemathesis
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from conftest import (
    LOOPBACK, ROOT, TOKENS, clean_env, csv_batch, isotherm, json_batch, start_server, tokens_json,
)
from sorbrank.service.app import create_app
from sorbrank.service.auth import parse_tokens
from sorbrank.service.config import Settings
from sorbrank.worker.store import Store

PROBLEM = "application/problem+json"
MEDIA = {"csv": "text/csv", "json": "application/json",
         "parquet": "application/vnd.apache.parquet"}
UPLOAD_LIMIT = 8 * 1024 * 1024
TRIED: collections.Counter = collections.Counter()  # requests sent, by kind (for the report)
FUZZ = settings(max_examples=100, deadline=None, derandomize=True, database=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                       HealthCheck.function_scoped_fixture])


def auth(who: str = "admin") -> dict:
    return {"Authorization": f"Bearer {TOKENS[who][0]}"}


@pytest.fixture(scope="module")
def root(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("hostile")


@pytest.fixture(scope="module")
def app(root):
    """The real app; chunks are only recorded (intake and storage are what is under test)."""
    settings_ = Settings(data_dir=root / "data", chunk_size=2, embedded_workers=1,
                         tokens=tuple(parse_tokens(tokens_json(), "test")),
                         max_upload_bytes=UPLOAD_LIMIT)
    queued = []
    application = create_app(settings_, enqueue=lambda b, c: queued.append((b, c)))
    application.testing = True
    application.extensions["queued"] = queued
    return application


@pytest.fixture(scope="module")
def client(app):
    return app.test_client()


@pytest.fixture(scope="module", autouse=True)
def report_counts():
    yield
    print(f"\nhostile input: requests tried {dict(TRIED)} (total {sum(TRIED.values())})")


def check_answer(resp, kind: str, store_root: Path | None = None) -> dict:
    """The invariants of every answer to a submitted body."""
    TRIED[kind] += 1
    body = resp.get_data()
    assert resp.status_code < 500, (resp.status_code, body[:2000])
    doc = json.loads(body)
    if resp.status_code >= 400:
        assert resp.mimetype == PROBLEM, resp.mimetype
        assert doc["status"] == resp.status_code and doc["title"] and doc["type"]
        for issue in doc.get("issues", []):
            assert issue["batch"] and issue["code"] and issue["message"], issue
    else:
        assert resp.status_code == 202, resp.status_code
        assert doc["accepted"] >= 1 and doc["batch_id"].startswith("b-")
        for issue in doc["rejected"]:
            assert issue["batch"] and issue["code"] and issue["message"], issue
            assert issue["isotherm"] or issue["row"] is not None or issue["field"], issue
        if store_root is not None:
            assert Store(store_root).read_manifest(doc["batch_id"])["accepted"] == doc["accepted"]
    return doc


def post(client, body: bytes, media: str, **query):
    return client.post("/api/v1/batches", data=body, headers={"Content-Type": media, **auth()},
                       query_string=query)


# -- strategies ------------------------------------------------------------------------

NASTY = ["", " ", "0", "-1", "1e999", "-1e999", "nan", "NaN", "inf", "-Infinity", "Infinity",
         "1e-320", "1" * 400, "0x10", "1,5", '"', "'", "=cmd|' /C calc'!A0", "../../etc/passwd",
         "..\\..\\boot.ini", "/", "\\", ".", "..", "CON", "a\x00b", "\u202e", "\ud7ff", "日本",
         "CO2", "N2", "co2", "298.15", "kPa", "mmol/g", "p/p0", "bar", "wt%", "adsorption",
         "desorption", "#", "# units: pressure:kPa", "\r", "\t", "null", "true", "[]", "{}",
         "pressure:kPa,loading:mmol/g", "loading:", ";", "1,5e3"]
COLUMNS = ["sorbent_id", "adsorbate", "temperature_k", "pressure_kpa", "loading_mol_per_kg",
           "isotherm_id", "branch", "pressure", "loading", "pressure_unit", "loading_unit",
           "material_id", "saturation_pressure", "saturation_pressure_bar", "sample_mass_g",
           "loading_sigma", "sigma", "surface_area_m2_per_g", "units", "Pressure_KPA", "pressure_bar",
           " LOADING ", "loading_wt_percent", "loading_furlongs", "extra", ""]
cell = st.one_of(st.sampled_from(NASTY), st.text(max_size=12),
                 st.floats(allow_nan=True, allow_infinity=True).map(repr),
                 st.integers(-10**30, 10**30).map(str))


@st.composite
def csv_bodies(draw) -> bytes:
    header = draw(st.lists(st.sampled_from(COLUMNS), min_size=0, max_size=10))
    if draw(st.booleans()):
        header = COLUMNS[:5] + header
    width = max(len(header), 1)
    rows = draw(st.lists(st.lists(cell, min_size=0, max_size=width + 2), max_size=12))
    comments = draw(st.lists(st.sampled_from(["# units: pressure:kPa", "# units: loading:nope",
                                              "# pressure_unit: kPa", "# gas: G, molar_mass_g_per_mol=x",
                                              "# gas: H2S, molar_mass_g_per_mol=34.08",
                                              "# batch_label: ../x", "#", "# :"]), max_size=3))
    delimiter = draw(st.sampled_from([",", ",", ";", "\t", "|"]))
    text = "\n".join(comments + [delimiter.join(header)] + [delimiter.join(r) for r in rows])
    data = text.encode("utf-8", "surrogatepass")
    if draw(st.booleans()):
        data = draw(st.sampled_from([b"\xef\xbb\xbf", b"\xff\xfe", b"", b"\x00"])) + data
    return data


json_values = st.recursive(
    st.one_of(st.none(), st.booleans(), st.floats(allow_nan=True, allow_infinity=True),
              st.integers(-10**20, 10**20), st.sampled_from(NASTY), st.text(max_size=8)),
    lambda children: st.lists(children, max_size=4) | st.dictionaries(
        st.sampled_from(COLUMNS + ["isotherms", "defaults", "conditions", "mixtures", "gases",
                                   "batch_label", "components", "mole_fractions", "name",
                                   "molar_mass_g_per_mol", "total_pressure_bar",
                                   "adsorption_pressure_kpa", "adsorption_pressure"]),
        children, max_size=5),
    max_leaves=25)

numbers = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.integers(-5, 10**6),
                    st.sampled_from(["1", None, True, [], {}]))


@st.composite
def json_isotherm(draw) -> dict:
    n = draw(st.integers(0, 8))
    p_key, q_key = draw(st.sampled_from([("pressure", "loading"), ("pressure_kpa", "loading_mmol_per_g"),
                                         ("pressure_relative", "loading_mg_per_g")]))
    iso = {"sorbent_id": draw(cell), "adsorbate": draw(st.sampled_from(NASTY)),
           "temperature_k": draw(numbers),
           p_key: draw(st.lists(numbers, min_size=n, max_size=n + 1)),
           q_key: draw(st.lists(numbers, min_size=n, max_size=n + 1))}
    for key in draw(st.lists(st.sampled_from(COLUMNS[5:]), max_size=4)):
        iso[key] = draw(st.one_of(cell, numbers))
    for key in draw(st.lists(st.sampled_from(list(iso)), max_size=2)):
        iso.pop(key, None)
    return iso


@st.composite
def json_bodies(draw) -> bytes:
    if draw(st.integers(0, 3)) == 0:
        doc = draw(json_values)
    else:
        doc = {"isotherms": draw(st.lists(json_isotherm(), max_size=4))}
        if draw(st.booleans()):
            doc["isotherms"].append(isotherm("GOOD", 2.0, 0.1))
        if draw(st.booleans()):
            doc.update(draw(st.dictionaries(st.sampled_from(
                ["units", "sample_mass_g", "gases", "defaults", "bogus"]),
                st.one_of(cell, json_values), max_size=3)))
        if draw(st.booleans()):
            doc["conditions"] = draw(json_values)
        if draw(st.booleans()):
            doc["mixtures"] = draw(json_values)
        if draw(st.booleans()):
            doc["batch_label"] = draw(cell)
    text = json.dumps(doc, allow_nan=True)  # NaN / Infinity tokens on purpose
    if draw(st.booleans()):
        cut = draw(st.integers(0, len(text)))
        text = text[:cut]
    return text.encode("utf-8", "surrogatepass")


arrow_columns = st.sampled_from([
    pa.array([1.0, math.nan, math.inf]), pa.array([-1, 0, 2**40]), pa.array(["a", "../b", ""]),
    pa.array([True, False, None]), pa.array([None, None, None], pa.null()),
    pa.array([[1.0], [], None], pa.list_(pa.float64())), pa.array([b"\xff", b"", b"x"]),
    pa.array(["CO2", "N2", "co2"]), pa.array([298.15, 77.0, -5.0]),
    pa.array(["kPa", "p/p0", "nope"]), pa.array([1, 2, 3], pa.int8()),
    pa.array([{"x": 1}, None, {"x": 2}]), pa.array([1.5, 2.5, 3.5], pa.float32()),
])


@st.composite
def parquet_bodies(draw) -> bytes:
    names = draw(st.lists(st.sampled_from(COLUMNS[:-1]), unique_by=lambda c: c.strip().lower(),
                          max_size=9))
    table = pa.table({name: draw(arrow_columns) for name in names}) if names else \
        pa.table({"x": pa.array([1])})
    meta = draw(st.dictionaries(st.sampled_from(["units", "pressure_unit", "batch_label", "gases",
                                                 "sample_mass_g", "junk"]), st.sampled_from(NASTY),
                                max_size=3))
    table = table.replace_schema_metadata(meta)
    sink = io.BytesIO()
    try:
        pq.write_table(table, sink)
    except (pa.ArrowException, ValueError):  # a type Parquet cannot hold: send raw bytes
        return b"PAR1" + draw(st.binary(max_size=200)) + b"PAR1"
    data = sink.getvalue()
    mangle = draw(st.integers(0, 3))
    if mangle == 1:
        data = data[: draw(st.integers(0, len(data)))]
    elif mangle == 2:
        at = draw(st.integers(0, len(data) - 1))
        data = data[:at] + bytes([data[at] ^ 0xFF]) + data[at + 1:]
    return data


# -- property-based bodies ---------------------------------------------------------------

@FUZZ
@given(body=csv_bodies())
def test_fuzzed_csv_bodies_never_5xx(client, app, body):
    check_answer(post(client, body, "text/csv"), "csv", app.extensions["sorbrank"].store.root)


@FUZZ
@given(body=json_bodies())
def test_fuzzed_json_bodies_never_5xx(client, app, body):
    check_answer(post(client, body, "application/json"), "json",
                 app.extensions["sorbrank"].store.root)


@FUZZ
@given(body=parquet_bodies())
def test_fuzzed_parquet_bodies_never_5xx(client, app, body):
    check_answer(post(client, body, "application/vnd.apache.parquet"), "parquet",
                 app.extensions["sorbrank"].store.root)


@FUZZ
@given(body=st.binary(max_size=400), media=st.sampled_from(
    list(MEDIA.values()) + ["application/octet-stream", "text/plain", "", "multipart/form-data"]),
    query=st.dictionaries(st.sampled_from(["format", "units", "pressure_unit", "delimiter",
                                           "decimal", "batch_label", "models", "criterion",
                                           "weighting", "sample_mass_g"]), cell, max_size=3))
def test_random_bytes_media_types_and_query_never_5xx(client, body, media, query):
    resp = client.post("/api/v1/batches", data=body, query_string=query,
                       headers={"Content-Type": media, **auth()})
    check_answer(resp, "bytes")


# -- named cases ------------------------------------------------------------------------------

def issues_of(doc: dict) -> list[dict]:
    return doc.get("issues") or doc.get("rejected") or []


def test_nan_and_infinity_tokens_are_rejected_by_row_and_field(client, app):
    raw = ('{"units": {"pressure": "kPa", "loading": "mol/kg"}, "isotherms": ['
           '{"isotherm_id": "J-NAN", "sorbent_id": "M", "adsorbate": "CO2", "temperature_k": 298,'
           ' "pressure": [1, 2, NaN, 4], "loading": [0.1, 0.2, 0.3, 0.4]},'
           '{"isotherm_id": "J-INF", "sorbent_id": "M", "adsorbate": "CO2", "temperature_k": 298,'
           ' "pressure": [1, 2, 3, 4], "loading": [0.1, Infinity, 0.3, 0.4]},'
           '{"isotherm_id": "J-T", "sorbent_id": "M", "adsorbate": "CO2",'
           ' "temperature_k": -Infinity, "pressure": [1, 2, 3], "loading": [0.1, 0.2, 0.3]}]}')
    doc = check_answer(post(client, raw.encode(), "application/json"), "named")
    found = {(i["isotherm"], i["row"], i["field"]) for i in issues_of(doc)}
    assert {("J-NAN", 2, "pressure"), ("J-INF", 1, "loading")} <= found, found
    assert any(i["isotherm"] == "J-T" and i["field"] == "temperature_k" for i in issues_of(doc))

    tokens = ["nan", "NaN", "inf", "-inf", "Infinity", "1e999"]
    good = csv_batch([isotherm("CSV-OK", 2.0, 0.1)])
    bad_rows = tuple(f"CSV-BAD{i},CO2,298.15,{10 + i},{tok}"
                     for i, tok in enumerate(tokens))
    doc = check_answer(post(client, good + "\n".join(bad_rows).encode() + b"\n", "text/csv"),
                       "named")
    assert doc["accepted"] == 1
    rows = {i["row"]: i for i in doc["rejected"] if i["field"] == "loading_mol_per_kg"}
    first_bad = len(isotherm("x", 1, 1)["pressure"]) + 1
    assert set(rows) >= set(range(first_bad, first_bad + len(tokens))), rows
    assert all(rows[r]["code"] in ("not_finite", "not_a_number") for r in rows)


def test_ids_with_path_separators_are_rejected_and_never_become_paths(client, app, root):
    evil = ["../../escape", "a/b", "..\\..\\escape", "..", "/abs", "C:\\temp\\x"]
    good = isotherm("SAFE-1", 2.0, 0.1)
    isotherms = [dict(isotherm(e, 2.0, 0.1)) for e in evil]
    isotherms += [dict(good, sorbent_id="SAFE-2", isotherm_id=e) for e in evil]
    doc = check_answer(post(client, json_batch(isotherms + [good]), "application/json"), "named",
                       app.extensions["sorbrank"].store.root)
    assert doc["accepted"] == 1
    named = {(i["isotherm"], i["field"], i["code"]) for i in doc["rejected"]}
    for e in evil:
        assert any(code == "invalid_id" and fld == "sorbent_id" for _, fld, code in named)
        assert any(code == "invalid_id" and fld == "isotherm_id" for _, fld, code in named)
    assert sum(i["code"] == "invalid_id" for i in doc["rejected"]) >= 2 * len(evil)
    assert all("path separator" in i["message"] or "relative path" in i["message"]
               for i in doc["rejected"] if i["code"] == "invalid_id")
    # the same ids in CSV and as a batch label
    csv_doc = check_answer(post(client, csv_batch([isotherm("../up", 1, 0.1),
                                                   isotherm("OK-CSV", 1, 0.1)]), "text/csv"),
                           "named")
    assert [i["code"] for i in csv_doc["rejected"]] == ["invalid_id"]
    label = check_answer(post(client, csv_batch([good]), "text/csv", batch_label="../../x"),
                         "named")
    assert label["issues"][0]["code"] == "invalid_batch_label"
    # nothing outside the store, no path made of a client's text
    data = app.extensions["sorbrank"].store.root.resolve()
    for dirpath, dirnames, filenames in os.walk(root):
        for name in dirnames + filenames:
            path = Path(dirpath, name).resolve()
            assert path == data or data in path.parents, path
            assert "escape" not in name and "abs" != name and "up" != name, path


def test_deep_and_huge_json(client):
    for body in (b"[" * 200_000, b'{"isotherms": ' + b"[" * 5_000 + b"]" * 5_000 + b"}",
                 b'{"isotherms": [' + b'{"a":' * 3_000 + b"1" + b"}" * 3_000 + b"]}"):
        doc = check_answer(post(client, body, "application/json"), "named")
        assert doc["status"] in (400, 422)
    # a 6 MB id and a 300 000-point isotherm: per-isotherm rejections, named
    long_id = dict(isotherm("L", 1, 0.1), sorbent_id="M" * 6_000_000)
    many = dict(isotherm("MANY", 1, 0.1), isotherm_id="MANY",
                pressure=list(range(1, 300_001)), loading=[1.0] * 300_000)
    doc = check_answer(post(client, json_batch([long_id]), "application/json"), "named")
    assert doc["status"] == 422 and doc["issues"][0]["code"] == "invalid_id"
    assert len(json.dumps(doc)) < 100_000  # the answer does not echo the 6 MB back
    doc = check_answer(post(client, json_batch([many]), "application/json"), "named")
    assert doc["issues"][0]["code"] == "too_many_points" and doc["issues"][0]["isotherm"] == "MANY"


def test_csv_with_a_million_columns(client):
    header = b"sorbent_id,adsorbate,temperature_k,pressure,loading" + b",x" * 1_000_000
    doc = check_answer(post(client, header + b"\nM,CO2,298,1,1\n", "text/csv"), "named")
    assert doc["status"] in (400, 413, 422) and doc["issues"][0]["code"] == "too_many_columns"
    row = b"M,CO2,298,1,1" + b",1" * 1_000_000
    doc = check_answer(post(client, csv_batch([isotherm("W", 1, 0.1)]) + row + b"\n", "text/csv"),
                       "named")
    assert doc["status"] == 400 and doc["issues"][0]["code"] == "malformed_row"


def test_non_utf8_and_odd_encodings(client):
    good = csv_batch([isotherm("ENC", 1, 0.1)])
    for body in (good.replace(b"ENC", b"\xe9NC"), b"\xff\xfe" + good.decode().encode("utf-16-le"),
                 good.replace(b"ENC", b"\xed\xa0\x80"), b"\xc0\xaf" + good):
        doc = check_answer(post(client, body, "text/csv"), "named")
        assert doc["status"] == 400 and doc["issues"][0]["code"] == "not_utf8"
    # a lone surrogate is legal JSON escape syntax but not text: rejected, not a crash
    doc = check_answer(post(client, json_batch([isotherm("\ud800", 1, 0.1)]), "application/json"),
                       "named")
    assert doc["status"] in (400, 422)
    doc = check_answer(post(client, good.decode().encode("latin-1"), "application/json"), "named")
    assert doc["status"] == 400


def test_schemathesis_fuzz_of_every_documented_operation(app, client):
    """Every operation of /api/v1/openapi.json, driven by schemathesis: no 5xx, and the
    status code, content type and (where the document has one) body schema conform."""
    import warnings

    from hypothesis import Phase
    from schemathesis import checks

    # something to read, so result and ranking reads return real rows
    check_answer(post(client, csv_batch([isotherm("SC-1", 2.0, 0.1)]), "text/csv"), "named")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        schema = schemathesis.openapi.from_wsgi("/api/v1/openapi.json", app)
    ran, failures = collections.Counter(), []
    # schema-conformance checks only: a CSV body's schema is just "a string", so
    # schemathesis' "schema-valid data must be accepted" cannot apply to batches
    CONFORMANCE = [checks.not_a_server_error, checks.status_code_conformance,
                   checks.content_type_conformance, checks.response_headers_conformance,
                   checks.response_schema_conformance]

    for result in schema.get_all_operations():
        operation = result.ok()

        @settings(max_examples=30, deadline=None, derandomize=True, database=None,
                  phases=[Phase.explicit, Phase.generate],
                  suppress_health_check=list(HealthCheck))
        @given(case=operation.as_strategy())
        def one(case):
            case.headers = {**(case.headers or {}), **auth()}
            response = case.call()
            ran[operation.label] += 1
            assert response.status_code < 500, (operation.label, response.status_code,
                                                response.text[:500])
            try:
                case.validate_response(response, checks=CONFORMANCE)
            except Exception as exc:  # collected, reported together below
                failures.append(f"{operation.label}: {str(exc)[:600]}")
                raise

        try:
            one()
        except AssertionError:
            raise
        except Exception as exc:  # noqa: BLE001 - validation details are in ``failures``
            if not failures or not failures[-1].startswith(operation.label):
                failures.append(f"{operation.label}: {type(exc).__name__}: {str(exc)[:600]}")
    TRIED["schemathesis"] += sum(ran.values())
    assert not failures, "\n".join(dict.fromkeys(failures))
    documented = json.loads(client.get("/api/v1/openapi.json").data)["paths"]
    expected = {f"{m.upper()} {path}" for path, ops in documented.items() for m in ops
                if m in ("get", "post", "put", "delete", "patch")}
    # schemathesis leaves out the document it was loaded from; test_api reads that one
    assert set(ran) == expected - {"GET /api/v1/openapi.json"}, expected ^ set(ran)


# -- over a real socket ---------------------------------------------------------------------

@pytest.fixture(scope="module")
def live(tmp_path_factory):
    base = tmp_path_factory.mktemp("hostile-live")
    env = clean_env(SORBRANK_DATA_DIR=str(base / "data"), SORBRANK_EMBEDDED_WORKERS="1",
                    SORBRANK_TOKENS=tokens_json(), SORBRANK_MAX_UPLOAD_BYTES="100000",
                    PYTHONPATH=str(ROOT))
    registry = []
    try:
        _, url = start_server(env, base / "logs", registry, name="hostile-server")
        yield url, base
    finally:
        for proc in registry:
            proc.stop()


def raw_request(port: int, head: str, body_parts, max_parts: int) -> bytes:
    """Send ``head`` and then parts of a body until the server answers; its answer."""
    with socket.create_connection((LOOPBACK, port), timeout=60) as sock:
        sock.sendall(head.encode())
        sent = 0
        for part in body_parts:
            readable, _, _ = select.select([sock], [], [], 0)
            if readable or sent >= max_parts:
                break
            try:
                sock.sendall(part)
            except (BrokenPipeError, ConnectionResetError):
                break
            sent += 1
        return read_response(sock)


def read_response(sock: socket.socket) -> bytes:
    """One HTTP response: the head and Content-Length bytes of body (the server may keep
    the connection open after answering early, so reading to EOF could wait forever)."""
    answer = b""
    for _ in range(1000):  # bounded: the socket timeout bounds each read
        head, sep, body = answer.partition(b"\r\n\r\n")
        if sep:
            length = next((int(line.split(b":", 1)[1]) for line in head.split(b"\r\n")
                           if line.lower().startswith(b"content-length:")), None)
            if length is not None and len(body) >= length:
                break
        try:
            data = sock.recv(65536)
        except ConnectionResetError:
            break
        if not data:
            break
        answer += data
    return answer


def test_oversize_bodies_get_413_without_being_read(live):
    url, _ = live
    port = int(url.rsplit(":", 1)[1])
    token = TOKENS["submitter"][0]
    claimed = 50 * 1024 * 1024 * 1024  # 50 GiB announced; only a few KiB are ever sent
    start_line = (f"POST /api/v1/batches HTTP/1.1\r\nHost: {LOOPBACK}\r\n"
                  f"Authorization: Bearer {token}\r\nContent-Type: text/csv\r\n")
    head = start_line + f"Content-Length: {claimed}\r\n\r\n"
    answer = raw_request(port, head, iter([b"sorbent_id," * 100] * 10), max_parts=3)
    assert answer.startswith(b"HTTP/1.1 413"), answer[:300]
    assert b"application/problem+json" in answer

    chunk = b"x" * 16384
    head = start_line + "Transfer-Encoding: chunked\r\n\r\n"
    endless = (f"{len(chunk):x}\r\n".encode() + chunk + b"\r\n" for _ in range(10_000))
    # at most 40 x 16 KiB = 6.5 x the limit is offered; an answer stops the sending earlier
    answer = raw_request(port, head, endless, max_parts=40)
    assert answer.startswith(b"HTTP/1.1 413"), answer[:300]
    assert b"application/problem+json" in answer


def test_path_traversal_in_urls_is_404_or_400(live):
    url, base = live
    port = int(url.rsplit(":", 1)[1])
    paths = ["/api/v1/batches/../../etc/passwd", "/api/v1/batches/..%2F..%2Fetc%2Fpasswd",
             "/api/v1/batches/%2e%2e/results", "/api/v1/batches/..%5C..%5Cmanifest.json",
             "/api/v1/batches/b-20990101-000000-000000-00000000%2F..%2F..%2Fidempotency",
             "/api/v1/batches/%00/results",
             "/api/v1/isotherms/..%2F..%2Fetc%2Fpasswd/plot",
             "/api/v1/isotherms/x/plot?batch_id=..%2F..%2Fetc",
             "/api/v1/sorbents/..%2F..%2Fetc%2Fpasswd", "/api/v1/sorbents/%2e%2e",
             "/assets/../../etc/passwd", "/assets/..%2F..%2Fservice%2Fauth.py",
             "/assets/%2e%2e%2fpages.py", "/sorbents/..%2F..%2Fetc%2Fpasswd"]
    for path in paths:
        conn = http.client.HTTPConnection(LOOPBACK, port, timeout=30)
        conn.putrequest("GET", path, skip_accept_encoding=True)
        conn.putheader("Authorization", f"Bearer {TOKENS['admin'][0]}")
        conn.endheaders()
        resp = conn.getresponse()
        body = resp.read()
        conn.close()
        TRIED["traversal"] += 1
        assert resp.status in (400, 404), (path, resp.status, body[:300])
        assert b"root:" not in body and b"hmac" not in body and b"import" not in body, path


def chunked(body: bytes, size: int = 8192) -> bytes:
    parts = [body[i:i + size] for i in range(0, len(body), size)]
    return b"".join(f"{len(p):x}\r\n".encode() + p + b"\r\n" for p in parts) + b"0\r\n\r\n"


def test_complete_chunked_body_over_the_limit_is_refused_not_truncated(live):
    """A whole, valid CSV sent chunked (no Content-Length) and larger than the limit must be
    refused: reading only its first ``limit`` bytes would accept a silently cut batch."""
    url, _ = live
    token = TOKENS["submitter"][0]
    batches_before = requests_get_total(url)
    big = csv_batch([isotherm(f"CH{i:04d}", 2.0, 0.1) for i in range(500)])
    small = csv_batch([isotherm("CH-SMALL", 2.0, 0.1)])
    assert len(big) > 100_000 > len(small)
    answers = {}
    for name, body in (("big", big), ("small", small)):
        with socket.create_connection((LOOPBACK, int(url.rsplit(":", 1)[1])), timeout=60) as sock:
            sock.sendall((f"POST /api/v1/batches HTTP/1.1\r\nHost: {LOOPBACK}\r\n"
                          f"Authorization: Bearer {token}\r\nContent-Type: text/csv\r\n"
                          "Transfer-Encoding: chunked\r\nConnection: close\r\n\r\n").encode())
            try:
                sock.sendall(chunked(body))
            except (BrokenPipeError, ConnectionResetError):
                pass
            answer = read_response(sock)
        TRIED["chunked"] += 1
        answers[name] = answer
    assert answers["big"].startswith(b"HTTP/1.1 413"), answers["big"][:400]
    assert answers["small"].startswith(b"HTTP/1.1 202"), answers["small"][:400]
    assert requests_get_total(url) == batches_before + 1  # only the small one exists


def requests_get_total(url: str) -> int:
    import requests

    return requests.get(f"{url}/api/v1/batches", headers=auth("reader"), timeout=30).json()["total"]


# -- text, numbers and Parquet that intake must refuse, over a real socket (issue 17) -------

def post_live(url: str, body: bytes, media: str, **query):
    import requests

    TRIED["intake-refusal"] += 1
    return requests.post(f"{url}/api/v1/batches", data=body, params=query, timeout=60,
                         headers={"Content-Type": media, **auth("submitter")})


def co2_n2_isotherms(sorbent_id: str = "TG31-S1") -> list[dict]:
    return [isotherm(sorbent_id, 2.0, 0.1), isotherm(sorbent_id, 1.0, 0.01, adsorbate="N2")]


def refused(resp, code: str, fld: str | None = None) -> dict:
    """A 4xx problem document with an issue of ``code`` (on ``fld``)."""
    assert 400 <= resp.status_code < 500, (resp.status_code, resp.text[:1500])
    assert resp.headers["Content-Type"].startswith(PROBLEM)
    doc = resp.json()
    matching = [i for i in doc.get("issues", []) if i["code"] == code
                and (fld is None or i["field"] == fld)]
    assert matching, doc
    assert matching[0]["batch"] and matching[0]["message"]
    return matching[0]


def json_with(isotherms: list[dict], **top) -> bytes:
    # json.dumps escapes a lone surrogate as \udXXX: valid JSON text that decodes to one
    return json.dumps({"units": {"pressure": "kPa", "loading": "mol/kg"},
                       "isotherms": isotherms, **top}).encode()


def wait_settled(url: str, batch_id: str) -> dict:
    import requests

    from conftest import wait_until

    def settled():
        status = requests.get(f"{url}/api/v1/batches/{batch_id}", headers=auth("reader"),
                              timeout=30).json()
        return status if status["state"] in ("done", "partial", "failed") else None

    return wait_until(settled, f"batch {batch_id} to settle", timeout_s=180)


def test_lone_surrogates_in_text_fields_are_4xx_never_accepted_then_failed(live):
    """Item 5 and 11: the mixture's sorbent id was accepted (202) and failed the chunk,
    good isotherms included; batch_label and isotherm_id answered 500."""
    url, _ = live
    before = requests_get_total(url)
    mixture = {"sorbent_id": "TG31\ud800", "components": ["CO2", "N2"],
               "mole_fractions": [0.15, 0.85], "total_pressure_bar": 1.0, "temperature_k": 298.15}
    issue = refused(post_live(url, json_with(co2_n2_isotherms(), mixtures=[mixture]),
                              "application/json"), "invalid_mixture", "mixtures[0].sorbent_id")
    assert "surrogate" in issue["message"]
    issue = refused(post_live(url, json_with(co2_n2_isotherms(), batch_label="run\udc00-7"),
                              "application/json"), "invalid_batch_label")
    assert "surrogate" in issue["message"]
    for fld, code in (("isotherm_id", "invalid_id"), ("sorbent_id", "invalid_id"),
                      ("adsorbate", "invalid_text"), ("branch", "invalid_text")):
        bad = {**isotherm("TG31-S1", 2.0, 0.1), fld: "TG31\udbff"}
        issue = refused(post_live(url, json_with([bad]), "application/json"), code, fld)
        assert "surrogate" in issue["message"], issue
    assert requests_get_total(url) == before  # nothing refused was stored

    # one bad isotherm among good ones: 202 for the good, the bad listed, the batch done
    bad = {**isotherm("TG31-S9", 2.0, 0.1), "isotherm_id": "TG31\ud800"}
    resp = post_live(url, json_with([isotherm("TG31-S1", 2.0, 0.1), bad]), "application/json")
    assert resp.status_code == 202, resp.text[:1500]
    doc = resp.json()
    assert doc["accepted"] == 1
    assert [(i["code"], i["field"]) for i in doc["rejected"]] == [("invalid_id", "isotherm_id")]
    status = wait_settled(url, doc["batch_id"])
    assert status["state"] == "done", status


def test_invisible_characters_long_labels_and_bad_numbers_are_4xx(live):
    """Items 8, 11, 12, 13 over HTTP: each answer a 4xx naming the field, never a 5xx."""
    url, _ = live
    issue = refused(post_live(url, json_with([isotherm("TG31\u202e1S", 2.0, 0.1)]),
                              "application/json"), "invalid_id", "sorbent_id")
    assert "U+202E" in issue["message"] and "\u202e" not in issue["message"]
    refused(post_live(url, json_with([isotherm("TG31\u200b-S1", 2.0, 0.1)]),
                      "application/json"), "invalid_id", "sorbent_id")

    resp = post_live(url, csv_batch([isotherm("TG31-S1", 2.0, 0.1)]), "text/csv",
                     batch_label="L" * 10_000)
    issue = refused(resp, "invalid_batch_label")
    assert "10000 characters" in issue["message"]
    assert "L" * 81 not in resp.text and len(resp.content) < 3000

    overflow = {**isotherm("TG31-S1", 2.0, 0.1), "loading": [1e306] * 9}
    body = json.dumps({"units": {"pressure": "kPa", "loading": "mol/g"},
                       "isotherms": [overflow]}).encode()
    issue = refused(post_live(url, body, "application/json"), "out_of_range", "loading")
    assert issue["row"] == 0 and "overflows" in issue["message"]
    hot = {**isotherm("TG31-S1", 2.0, 0.1), "temperature_k": 1e300}
    refused(post_live(url, json_with([hot]), "application/json"), "out_of_range", "temperature_k")

    refs = {"reference_pressures_kpa": list(range(1, 5046))}
    refused(post_live(url, json_with(co2_n2_isotherms(), conditions=refs), "application/json"),
            "invalid_conditions", "conditions.reference_pressures")


def test_hostile_parquet_over_http_is_4xx(live):
    """Item 11 and 13: int64 at 2**63-1 and uint64 near 2**64 answered 500; duplicate
    column names dumped the reader's internal schema."""
    url, _ = live
    n = 5
    base = {"sorbent_id": ["TG31-S1"] * n, "adsorbate": ["CO2"] * n, "temperature_k": [298.15] * n,
            "pressure_kpa": [1.0, 2.0, 5.0, 10.0, 20.0], "loading_mol_per_kg": [0.1, 0.2, 0.4, 0.6, 0.8]}
    for kind, value in ((pa.int64(), 2**63 - 1), (pa.uint64(), 2**64 - 5)):
        table = pa.table({**base, "pressure_kpa": pa.array([1, 2, 3, 4, value], kind)})
        sink = io.BytesIO()
        pq.write_table(table, sink)
        issue = refused(post_live(url, sink.getvalue(), MEDIA["parquet"]), "out_of_range",
                        "pressure_kpa")
        assert issue["row"] == 5
    table = pa.table(base)
    table = pa.Table.from_arrays([table.column(0)] + table.columns,
                                 names=["sorbent_id"] + table.column_names)
    sink = io.BytesIO()
    pq.write_table(table, sink)
    resp = post_live(url, sink.getvalue(), MEDIA["parquet"])
    refused(resp, "duplicate_column", "sorbent_id")
    assert "FieldRef" not in resp.text and "__fragment_index" not in resp.text
