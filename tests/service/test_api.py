"""The HTTP API in detail, through Flask's test client.

Chunks run inline through the real job code (``jobs.execute_chunk``), so a
202 here is followed by real fitting before the next request.
"""
from __future__ import annotations

import io
import re
import subprocess
import sys

import pyarrow.parquet as pq
import pytest
from openapi_spec_validator import validate

from conftest import TOKENS, clean_env, csv_batch, free_port, isotherm, json_batch, parquet_batch, tokens_json
from sorbrank.service.api.formats import safe_cell
from sorbrank.service.app import create_app
from sorbrank.service.auth import parse_tokens
from sorbrank.service.config import ConfigError, Settings, load_settings, open_access_verdict
from sorbrank.service.openapi import document
from sorbrank.worker import jobs
from sorbrank.worker.store import Store, new_batch_id


def make_app(tmp_path, *, tokens=True, **overrides):
    settings = Settings(data_dir=tmp_path / "data", chunk_size=2, embedded_workers=1,
                        tokens=tuple(parse_tokens(tokens_json(), "test")) if tokens else (),
                        **overrides)
    store = Store(settings.data_dir)
    app = create_app(settings, enqueue=lambda batch_id, chunk: jobs.execute_chunk(store, batch_id, chunk))
    app.testing = True
    return app


def auth(who="submitter"):
    return {"Authorization": f"Bearer {TOKENS[who][0]}"}


@pytest.fixture
def app(tmp_path):
    return make_app(tmp_path)


@pytest.fixture
def client(app):
    return app.test_client()


def submit(client, body, content_type="text/csv", who="submitter", **kw):
    headers = {"Content-Type": content_type, **auth(who), **kw.pop("headers", {})}
    return client.post("/api/v1/batches", data=body, headers=headers, **kw)


def assert_problem(resp, status):
    assert resp.status_code == status, resp.get_data(as_text=True)
    assert resp.mimetype == "application/problem+json"
    doc = resp.get_json(force=True)
    assert doc["status"] == status and doc["title"] and doc["type"]
    return doc


# -- the OpenAPI document ----------------------------------------------------------

def test_openapi_document_validates_and_covers_every_route(app):
    doc = app.test_client().get("/api/v1/openapi.json").get_json()
    validate(doc)
    routed = {}
    for rule in app.url_map.iter_rules():
        if rule.endpoint == "static":
            continue
        path = re.sub(r"<(?:[^:<>]+:)?([^<>]+)>", r"{\1}", rule.rule)
        routed.setdefault(path, set()).update(m.lower() for m in rule.methods - {"HEAD", "OPTIONS"})
    assert set(routed) == set(doc["paths"])
    for path, methods in routed.items():
        assert methods == set(doc["paths"][path]) - {"parameters"}, path
    assert document() == doc


# -- submitting ----------------------------------------------------------------------

def test_submit_csv_json_parquet_and_octet_stream(client):
    bodies = [(csv_batch([isotherm("C1", 2, 0.1)]), "text/csv", {}),
              (json_batch([isotherm("J1", 2, 0.1)]), "application/json", {}),
              (parquet_batch([isotherm("P1", 2, 0.1)]), "application/vnd.apache.parquet", {}),
              (parquet_batch([isotherm("P2", 2, 0.1)]), "application/octet-stream",
               {"query_string": {"format": "parquet"}})]
    for body, media, extra in bodies:
        resp = submit(client, body, media, **extra)
        assert resp.status_code == 202, resp.get_data(as_text=True)
        status = client.get(resp.json["status_url"], headers=auth()).json
        assert status["state"] == "done" and status["counts"]["done"] == 1
    listed = client.get("/api/v1/batches", headers=auth()).json
    assert listed["total"] == 4
    ids = [b["batch_id"] for b in listed["batches"]]
    assert ids == sorted(ids, reverse=True)  # newest first
    assert client.get("/api/v1/batches?state=done", headers=auth()).json["total"] == 4
    assert client.get("/api/v1/batches?state=queued", headers=auth()).json["total"] == 0


def test_batch_wide_units_and_fit_options_from_query(client):
    body = csv_batch([isotherm("D1", 2, 0.1)]).replace(b"pressure_kpa,loading_mol_per_kg",
                                                       b"pressure,loading")
    resp = submit(client, body, query_string={"units": "pressure:kPa,loading:mol/kg",
                                              "models": "langmuir,sips", "criterion": "bic",
                                              "batch_label": "defaults-test"})
    assert resp.status_code == 202, resp.json
    results = client.get(f"{resp.json['status_url']}/results", headers=auth()).json
    assert {r["model"] for r in results["fits"]} == {"langmuir", "sips"}
    assert results["summary"][0]["criterion"] == "bic"
    assert abs(results["summary"][0]["q_sat_mol_per_kg"] - 2.0) < 0.01
    missing = submit(client, body)  # without units nothing is guessed
    doc = assert_problem(missing, 422)
    assert {i["code"] for i in doc["issues"]} == {"missing_unit"}


@pytest.mark.parametrize("params, name", [({"criterion": "r2"}, "criterion"),
                                          ({"models": "langmuir,nope"}, "models"),
                                          ({"weighting": "heavy"}, "weighting"),
                                          ({"format": "xlsx"}, "format"),
                                          ({"units": "pressure:kpaa"}, "units"),
                                          ({"units": "presure:kPa"}, "units"),
                                          ({"pressure_unit": "kPa"}, "pressure_unit"),
                                          ({"loading_unit": "mol/kg"}, "loading_unit")])
def test_bad_submit_parameters_are_400(client, params, name):
    doc = assert_problem(submit(client, csv_batch([isotherm("X", 1, 1)]), query_string=params), 400)
    assert name in doc["parameter"]
    if name in ("pressure_unit", "loading_unit"):
        assert "use units=" in doc["detail"]


def test_semicolon_decimal_comma_body_with_sample_mass_from_query(client):
    # the same isotherm as a comma file in mol/kg, sent semicolon-delimited with decimal
    # commas as absolute mmol on a 0.5 g sample: 1 mol/kg = 0.5 mmol on 0.5 g
    iso = isotherm("SC1", 2, 0.1)
    lines = ["sorbent_id;adsorbate;temperature_k;pressure_kpa;loading_mmol"]
    lines += [f"SC1;CO2;298,15;{p};{q * 0.5}".replace(".", ",") for p, q in
              zip(iso["pressure"], iso["loading"])]
    body = ("\n".join(lines) + "\n").encode()
    resp = submit(client, body, query_string={"sample_mass_g": "0.5", "models": "langmuir"})
    assert resp.status_code == 202, resp.json
    results = client.get(f"{resp.json['status_url']}/results", headers=auth()).json
    assert abs(results["summary"][0]["q_sat_mol_per_kg"] - 2.0) < 0.01
    wrong = assert_problem(submit(client, body, query_string={"delimiter": "comma",
                                                              "sample_mass_g": "0.5"}), 422)
    assert wrong["issues"][0]["field"] == "delimiter"
    assert "semicolon-delimited" in wrong["issues"][0]["message"]


def test_unreadable_and_unacceptable_bodies(client):
    assert_problem(submit(client, b"\xff\xfe\x00garbage", "text/csv"), 400)
    doc = assert_problem(submit(client, b"{not json", "application/json"), 400)
    assert doc["issues"][0]["code"] == "unparseable"
    doc = assert_problem(submit(client, b"sorbent_id,pressure\nM,1\n"), 422)
    assert doc["issues"][0]["code"] == "missing_column"
    nothing = csv_batch([], extra_lines=("N1,CO2,298,1,x",))
    doc = assert_problem(submit(client, nothing), 422)
    assert doc["issues"][0]["row"] == 1 and doc["issues"][0]["field"] == "loading_mol_per_kg"
    assert "N1" in doc["issues"][0]["isotherm"]
    assert_problem(submit(client, b"a,b\n", "text/plain"), 415)
    assert client.get("/api/v1/batches", headers=auth()).json["total"] == 0


def test_body_over_the_limit_is_413_before_reading(tmp_path):
    client = make_app(tmp_path, max_upload_bytes=1000).test_client()
    doc = assert_problem(submit(client, csv_batch([isotherm("B", 1, 1)] * 6)), 413)
    assert doc["max_bytes"] == 1000
    assert not (tmp_path / "data" / "batches").exists()


# -- idempotency ------------------------------------------------------------------------

def test_idempotency_key_returns_the_same_batch(app, client):
    body = csv_batch([isotherm("I1", 1, 0.1)])
    first = submit(client, body, headers={"Idempotency-Key": "abc-1"})
    again = submit(client, body, headers={"Idempotency-Key": "abc-1"})
    assert first.status_code == again.status_code == 202
    assert first.json == again.json
    assert len(Store(app.extensions["sorbrank"].settings.data_dir).batch_ids()) == 1
    other = submit(client, csv_batch([isotherm("I2", 1, 0.1)]), headers={"Idempotency-Key": "abc-1"})
    assert assert_problem(other, 422)["batch_id"] == first.json["batch_id"]
    # keys belong to their client: another token's same key is a new batch
    admins = submit(client, body, who="admin", headers={"Idempotency-Key": "abc-1"})
    assert admins.status_code == 202 and admins.json["batch_id"] != first.json["batch_id"]


def test_idempotency_survives_a_crash_between_key_and_manifest(app, client):
    import hashlib

    store = app.extensions["sorbrank"].store
    body = csv_batch([isotherm("I3", 1, 0.1)])
    # what a crash right after binding the key to a batch id leaves on disk
    reserved = new_batch_id()
    key_hash = hashlib.sha256(b"submitter\0crash-key").hexdigest()
    first = submit(client, body, headers={"Idempotency-Key": "probe"})
    fingerprint = store.read_idempotency(hashlib.sha256(b"submitter\0probe").hexdigest())["fingerprint"]
    store.write_idempotency(key_hash, {"batch_id": reserved, "fingerprint": fingerprint})
    resp = submit(client, body, headers={"Idempotency-Key": "crash-key"})
    assert resp.status_code == 202 and resp.json["batch_id"] == reserved
    assert first.json["batch_id"] != reserved
    assert sorted(store.batch_ids()) == sorted([reserved, first.json["batch_id"]])


# -- reading -------------------------------------------------------------------------------

def test_unknown_or_malformed_batch_ids_are_404(client):
    for batch_id in ["b-20000101-000000-000000-00000000", "nope", "..", "b-x%2F..%2F..%2Fmanifest"]:
        assert_problem(client.get(f"/api/v1/batches/{batch_id}", headers=auth()), 404)
        assert_problem(client.get(f"/api/v1/batches/{batch_id}/results", headers=auth()), 404)
    assert_problem(client.get("/api/v1/sorbents/never-seen", headers=auth()), 404)


def test_result_formats_and_negotiation(client):
    batch_id = submit(client, csv_batch([isotherm("F1", 3, 0.1), isotherm("F2", 1, 0.2)])).json["batch_id"]
    url = f"/api/v1/batches/{batch_id}/results"
    as_json = client.get(url, headers=auth()).json
    assert set(as_json) >= {"summary", "fits", "sorbents", "rejected", "errors", "state"}
    only = client.get(url + "?table=fits", headers=auth()).json
    assert "summary" not in only and len(only["fits"]) == len(as_json["fits"])
    for accept, media in [("text/csv", "text/csv"),
                          ("application/vnd.apache.arrow.stream", "application/vnd.apache.arrow.stream"),
                          ("application/vnd.apache.parquet;q=0.9, text/csv;q=0.1",
                           "application/vnd.apache.parquet")]:
        resp = client.get(url, headers={**auth(), "Accept": accept})
        assert resp.status_code == 200 and resp.mimetype == media
    parquet = client.get(url + "?format=parquet&table=fits", headers=auth())
    assert pq.read_table(io.BytesIO(parquet.data)).num_rows == len(as_json["fits"])
    assert_problem(client.get(url, headers={**auth(), "Accept": "image/png"}), 406)
    assert_problem(client.get(url + "?format=xml", headers=auth()), 400)
    assert_problem(client.get(url + "?format=csv&table=everything", headers=auth()), 400)


def test_ids_a_spreadsheet_would_run_are_refused_and_other_text_stays_guarded(client):
    # an id beginning with = + - @ is refused at intake (formula_start), so no export
    # ever alters an id; the CSV guard stays for other text cells
    evil = ["=HYPERLINK(1)", "+SUM(A1)", "-2+3", "@cmd"]
    body = csv_batch([isotherm(m, 2, 0.1) for m in evil] + [isotherm("MOF-neg", 2, 0.1)])
    resp = submit(client, body)
    assert resp.status_code == 202 and resp.json["accepted"] == 1, resp.json
    refused = {(i["code"], i["field"], i["row"]) for i in resp.json["rejected"]}
    points = len(isotherm("x", 2, 0.1)["pressure"])  # rows per isotherm in the CSV
    assert refused == {("formula_start", "sorbent_id", 1 + points * k) for k in range(4)}
    assert all("formula" in i["message"] for i in resp.json["rejected"])
    text = client.get(f"{resp.json['status_url']}/results?format=csv", headers=auth()).get_data(as_text=True)
    import csv as pycsv

    rows = list(pycsv.DictReader(io.StringIO(text)))
    assert {r["sorbent_id"] for r in rows} == {"MOF-neg"}
    assert all(not v.startswith(("=", "+", "@")) for r in rows for v in r.values())
    # numbers stay numbers, negative ones included
    assert safe_cell(-1.5) == "-1.5" and safe_cell("-1.5e3") == "-1.5e3"
    assert safe_cell("=1+2") == "'=1+2" and safe_cell("@cmd") == "'@cmd"
    assert safe_cell("\tTAB") == "'\tTAB" and safe_cell("\rx") == "'\rx"
    # a list is an array literal: it starts with '{', which no spreadsheet runs
    assert safe_cell(["=a", "b"]) == "{=a,b}" and safe_cell(None) == ""


def test_rankings_parameters(client):
    for m, q in (("R1", 5.0), ("R2", 1.0), ("R3", 3.0)):
        submit(client, csv_batch([isotherm(m, q, 0.1)]))
    rows = client.get("/api/v1/rankings", headers=auth()).json["rows"]
    assert [r["sorbent_id"] for r in rows] == ["R1", "R3", "R2"]
    asc = client.get("/api/v1/rankings?order=asc&limit=2", headers=auth()).json
    assert [r["sorbent_id"] for r in asc["rows"]] == ["R2", "R3"] and asc["total"] == 3
    assert client.get("/api/v1/rankings?sorbent_id=R3", headers=auth()).json["total"] == 1
    assert client.get("/api/v1/rankings?adsorbate=N2", headers=auth()).json["total"] == 0
    for bad in ("sort=nonsense", "order=up", "limit=-1", "temperature_k=warm", "all=maybe"):
        assert_problem(client.get(f"/api/v1/rankings?{bad}", headers=auth()), 400)


def test_default_ranking_leads_with_supported_loadings_and_marks_mixed_conditions(client):
    """Truth set of our own (Langmuir data measured 1-100 kPa): the default
    sort is the loading at the adsorption pressure; a batch whose adsorption
    pressure (5 bar) lies beyond its data ranks after the rest unless
    unreliable_last=false; rows at two condition sets are marked in JSON, in
    the X-Mixed-Conditions header of every format, and carry their conditions."""
    import json as jsonlib

    submit(client, csv_batch([isotherm("D1", 2.0, 0.1), isotherm("D2", 1.0, 0.1)]))
    one = client.get("/api/v1/rankings", headers=auth())
    doc = one.json
    assert doc["sort"] == "loading_ads_mol_per_kg" and doc["unreliable_last"] is True
    assert [r["sorbent_id"] for r in doc["rows"]] == ["D1", "D2"]
    assert doc["mixed_conditions"] is False and one.headers["X-Mixed-Conditions"] == "false"
    assert doc["condition_sets"] == [{"adsorption_pressure_pa": 1e5,
                                      "adsorption_temperature_k": 298.15, "rows": 2}]
    row = doc["rows"][0]
    assert (row["adsorption_pressure_pa"], row["desorption_pressure_pa"]) == (1e5, 1e4)
    assert row["adsorption_temperature_k"] == row["desorption_temperature_k"] == 298.15
    assert row["loading_ads_reliable"] is True and "q_sat_reliable" in row
    # Langmuir q = q_sat b p / (1 + b p) at 100 kPa, b = 0.1 /kPa: 10/11 of q_sat
    assert row["loading_ads_mol_per_kg"] == pytest.approx(2.0 * 10 / 11, rel=1e-4)

    body = jsonlib.dumps({"units": {"pressure": "kPa", "loading": "mol/kg"},
                          "isotherms": [isotherm("D3", 9.0, 0.1)],
                          "conditions": {"adsorption_pressure_bar": 5.0,
                                         "desorption_pressure_bar": 0.1}}).encode()
    assert submit(client, body, "application/json").status_code == 202
    mixed = client.get("/api/v1/rankings", headers=auth())
    assert mixed.json["mixed_conditions"] is True
    assert mixed.headers["X-Mixed-Conditions"] == "true"
    assert {s["adsorption_pressure_pa"] for s in mixed.json["condition_sets"]} == {1e5, 5e5}
    # D3 has the largest loading, but at 5 bar, beyond its data: last by default
    assert [r["sorbent_id"] for r in mixed.json["rows"]] == ["D1", "D2", "D3"]
    assert mixed.json["rows"][2]["loading_ads_reliable"] is False
    in_place = client.get("/api/v1/rankings?unreliable_last=false", headers=auth()).json
    assert [r["sorbent_id"] for r in in_place["rows"]] == ["D3", "D1", "D2"]
    csv_reply = client.get("/api/v1/rankings?format=csv", headers=auth())
    assert csv_reply.headers["X-Mixed-Conditions"] == "true"
    assert "adsorption_pressure_pa" in csv_reply.get_data(as_text=True).splitlines()[0]
    # one batch: one condition set
    assert client.get("/api/v1/rankings?sorbent_id=D3", headers=auth()).json[
        "mixed_conditions"] is False
    assert_problem(client.get("/api/v1/rankings?unreliable_last=maybe", headers=auth()), 400)


def test_failed_chunk_gives_partial_batch_and_keeps_the_rest(app, client, tmp_path):
    store = app.extensions["sorbrank"].store
    from sorbrank.worker.intake import read_batch

    batch = read_batch(csv_batch([isotherm("G1", 1, 0.1), isotherm("G2", 2, 0.1),
                                  isotherm("G3", 3, 0.1)]), "csv")
    manifest = jobs.accept_batch(store, batch, options={}, chunk_size=2)
    # a chunk whose stored input is damaged cannot be fitted, whatever the retries
    store.table_path("inputs", manifest["batch_id"], 1).write_bytes(b"PAR1 damaged")
    for chunk in manifest["chunks"]:
        jobs.execute_chunk(store, manifest["batch_id"], chunk["index"])
    status = client.get(f"/api/v1/batches/{manifest['batch_id']}", headers=auth()).json
    assert status["state"] == "partial"
    assert status["counts"] == {"accepted": 3, "done": 2, "failed": 1, "rejected": 0}
    assert status["errors"][0]["chunk"] == 1 and status["errors"][0]["message"]
    results = client.get(f"/api/v1/batches/{manifest['batch_id']}/results", headers=auth()).json
    assert sorted(r["sorbent_id"] for r in results["summary"]) == ["G1", "G2"]
    assert store.read_final(manifest["batch_id"])["state"] == "partial"
    # the damaged file hides nothing else
    assert client.get("/api/v1/sorbents/G1", headers=auth()).json["isotherms"]
    assert client.get("/api/v1/rankings", headers=auth()).json["total"] == 2


def test_models_catalogue(client):
    models = client.get("/api/v1/models", headers=auth()).json["models"]
    assert "langmuir" in {m["id"] for m in models}


# -- auth --------------------------------------------------------------------------------

def test_tokens_and_scopes(client):
    assert_problem(client.get("/api/v1/batches"), 401)
    assert_problem(client.get("/api/v1/batches", headers={"Authorization": "Bearer wrong"}), 401)
    assert_problem(client.get("/api/v1/batches", headers={"Authorization": "Basic abc"}), 401)
    assert client.get("/api/v1/batches", headers=auth("reader")).status_code == 200
    assert client.get("/api/v1/batches", headers=auth("admin")).status_code == 200
    assert_problem(submit(client, csv_batch([isotherm("A", 1, 1)]), who="reader"), 403)
    assert submit(client, csv_batch([isotherm("A", 1, 1)]), who="admin").status_code == 202
    assert client.get("/healthz").status_code == 200
    assert client.get("/api/v1/openapi.json").status_code == 200


def test_open_mode_needs_no_token(tmp_path):
    client = make_app(tmp_path, tokens=False).test_client()
    assert client.get("/api/v1/rankings").status_code == 200


def test_token_configuration_errors_name_the_entry(tmp_path):
    with pytest.raises(ValueError, match=r"\[0\]\.sha256"):
        parse_tokens('[{"name": "x", "sha256": "abc", "scopes": ["read"]}]', "T")
    with pytest.raises(ValueError, match=r"\[1\]\.scopes"):
        parse_tokens('[{"name": "x", "sha256": "%s", "scopes": ["read"]},'
                     ' {"name": "y", "sha256": "%s", "scopes": ["root"]}]' % ("a" * 64, "b" * 64), "T")
    tokens_file = tmp_path / "tokens.json"
    tokens_file.write_text(tokens_json())
    assert len(load_settings({"SORBRANK_TOKENS_FILE": str(tokens_file)}).tokens) == 3


# -- configuration and readiness ----------------------------------------------------------

def test_settings_errors_are_collected_and_named():
    with pytest.raises(ConfigError) as err:
        load_settings({"SORBRANK_CHUNK_SIZE": "lots", "SORBRANK_BROKER_URL": "amqp://x",
                       "SORBRANK_MAX_UPLOAD_BYTES": "0", "SORBRANK_TOKENS": "[oops"})
    text = str(err.value)
    for name in ("SORBRANK_CHUNK_SIZE", "SORBRANK_BROKER_URL", "SORBRANK_MAX_UPLOAD_BYTES",
                 "SORBRANK_TOKENS"):
        assert name in text
    settings = load_settings({"SORBRANK_BROKER_URL": "redis://127.0.0.1:1/0", "SORBRANK_CHUNK_SIZE": "7"})
    assert settings.mode == "distributed" and settings.chunk_size == 7


def test_open_access_rules():
    open_settings = Settings()
    assert open_access_verdict(open_settings, "127.0.0.1")[0]
    assert "NO TOKENS" in open_access_verdict(open_settings, "::1")[1]
    assert not open_access_verdict(open_settings, "0.0.0.0")[0]
    assert open_access_verdict(Settings(allow_open=True), "0.0.0.0")[0]
    with_tokens = Settings(tokens=tuple(parse_tokens(tokens_json(), "t")))
    assert open_access_verdict(with_tokens, "0.0.0.0") == (True, None)


def test_serve_refuses_open_non_loopback_host(tmp_path):
    done = subprocess.run([sys.executable, "-m", "sorbrank.service.cli", "serve", "--host", "0.0.0.0",
                           "--port", str(free_port())],
                          env=clean_env(SORBRANK_DATA_DIR=str(tmp_path)), capture_output=True,
                          text=True, timeout=60)
    assert done.returncode == 2
    assert "refusing to serve on 0.0.0.0 without tokens" in done.stderr


def test_readyz_reports_unwritable_store_and_unreachable_broker(tmp_path):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a directory")
    client = make_app(tmp_path, tokens=False).test_client()
    assert client.get("/readyz").json["status"] == "ready"
    # no batch is submitted here, so nothing needs a queue
    stuck = create_app(Settings(data_dir=blocker / "data"), enqueue=lambda b, c: None).test_client()
    doc = assert_problem(stuck.get("/readyz"), 503)
    assert "not writable" in doc["detail"]
    dead_broker = create_app(Settings(data_dir=tmp_path / "d2",
                                      broker_url=f"redis://127.0.0.1:{free_port()}/0"),
                             enqueue=lambda b, c: None).test_client()
    doc = assert_problem(dead_broker.get("/readyz"), 503)
    assert "broker unreachable" in doc["detail"] and doc["mode"] == "distributed"
    assert stuck.get("/healthz").status_code == 200


@pytest.mark.parametrize("command", ["serve", "worker", "submit", "rank", "demo"])
def test_command_help_explains_and_gives_an_example(command, capsys):
    from sorbrank.service.cli import build_parser

    with pytest.raises(SystemExit) as exit_:
        build_parser().parse_args([command, "--help"])
    assert exit_.value.code == 0
    text = capsys.readouterr().out
    assert "example:" in text and f"sorbrank {command}" in text
    assert len(text.split("\n\n")[1]) > 80  # a real description, not just usage


def test_unmatched_page_urls_answer_with_html_and_api_urls_with_problem_json(client):
    # a sorbent id the router cannot take (an encoded newline) on the HTML page
    # path is documented as text/html; the same under /api/v1 stays problem+json
    page = client.get("/sorbents/a%0Ab/")
    assert page.status_code == 404 and page.mimetype == "text/html"
    api = client.get("/api/v1/no-such-resource", headers=auth("reader"))
    assert api.status_code == 404 and api.mimetype == "application/problem+json"


def test_csv_content_type_names_its_charset_once(client):
    # RFC 9110: one charset parameter; a doubled one confuses strict clients
    resp = client.get("/api/v1/rankings?format=csv", headers=auth("reader"))
    assert resp.status_code == 200
    assert resp.headers["Content-Type"].replace(" ", "").lower() == "text/csv;charset=utf-8"
