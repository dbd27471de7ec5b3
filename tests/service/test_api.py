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
from sorbrank.service.api.params import ACCEPTED
from sorbrank.service.app import create_app
from sorbrank.service.auth import parse_tokens
from sorbrank.service.config import ConfigError, Settings, load_settings, open_access_verdict
from sorbrank.service.openapi import document
from sorbrank.worker import jobs
from sorbrank.worker.store import Store, new_batch_id


def make_app(tmp_path, *, tokens=True, **overrides):
    settings = Settings(data_dir=tmp_path / "data", embedded_workers=1,
                        tokens=tuple(parse_tokens(tokens_json(), "test")) if tokens else (),
                        **{"chunk_size": 2, **overrides})
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


# -- query parameters: declared once, unknown ones refused ---------------------------

def _rule_url(rule) -> str:
    """A URL the rule matches, its variables filled with plausible values."""
    values = {name: (new_batch_id() if name == "batch_id" else "sorbrank.css"
                     if name == "filename" else "X1") for name in rule.arguments}
    return re.sub(r"<(?:[^:<>]+:)?([^<>]+)>", lambda m: values[m.group(1)], rule.rule)


def _operations(app):
    for rule in app.url_map.iter_rules():
        for method in sorted(rule.methods - {"HEAD", "OPTIONS"}):
            yield rule, method


def test_every_endpoint_refuses_an_unknown_query_parameter_naming_it(app):
    client = app.test_client()
    seen = set()
    for rule, method in _operations(app):
        resp = client.open(_rule_url(rule) + "?adsorbat=CO2&format=csv", method=method,
                           headers=auth())
        assert resp.status_code == 400, (rule.rule, method, resp.status_code)
        seen.add(rule.endpoint)
        if resp.mimetype == "text/html":  # the pages answer with their HTML error page
            assert not rule.rule.startswith("/api/") and "adsorbat" in resp.get_data(as_text=True)
            continue
        doc = assert_problem(resp, 400)
        accepted = [p.name for p in ACCEPTED[rule.endpoint]]
        wrong = ["adsorbat"] + ([] if "format" in accepted else ["format"])
        assert doc["type"] == "urn:sorbrank:problem:unknown-parameter"
        assert doc["unknown"] == wrong and doc["accepted"] == accepted, rule.rule
        assert all(f"'{name}'" in doc["detail"] for name in wrong)
    assert seen == set(app.view_functions)
    # without a token the 401 comes first; an open probe still checks its parameters
    assert client.get("/api/v1/rankings?adsorbat=CO2").status_code == 401
    assert client.get("/healthz?adsorbat=CO2").status_code == 400
    # a near miss of an accepted name is suggested
    doc = assert_problem(client.get("/api/v1/rankings?adsorbat=CO2", headers=auth()), 400)
    assert doc["suggestions"] == {"adsorbat": "adsorbate"} and "did you mean 'adsorbate'" in doc["detail"]


def test_an_endpoint_without_a_declaration_stops_the_app(tmp_path, monkeypatch):
    from sorbrank.service.api import params

    monkeypatch.delitem(params.ACCEPTED, "models.list_models")
    with pytest.raises(RuntimeError, match="models.list_models"):
        make_app(tmp_path)


def test_openapi_lists_exactly_the_declared_query_parameters_and_the_app_takes_them(app):
    doc = document()
    client = app.test_client()
    for rule, method in _operations(app):
        if rule.endpoint == "static":
            continue
        path = re.sub(r"<(?:[^:<>]+:)?([^<>]+)>", r"{\1}", rule.rule)
        operation = doc["paths"][path][method.lower()]
        documented = [p["name"] for p in operation.get("parameters", []) if p.get("in") == "query"]
        declared = [p.name for p in ACCEPTED[rule.endpoint]]
        assert documented == declared, (method, path)
        assert "400" in operation["responses"], (method, path)
        for name in documented:  # each one documented is taken, not refused as unknown
            resp = client.open(_rule_url(rule), method=method, headers=auth(),
                               query_string={name: "1"})
            body = resp.get_json(silent=True) or {}
            assert body.get("type") != "urn:sorbrank:problem:unknown-parameter", (path, name)
            assert resp.status_code < 500, (path, name, resp.get_data(as_text=True)[:300])


def test_repeatable_filters_repeat_and_other_parameters_may_not(client):
    ok = client.get("/api/v1/rankings?flag=a&flag=b&exclude_flag=c&exclude_flag=d", headers=auth())
    assert ok.status_code == 200
    doc = assert_problem(client.get("/api/v1/rankings?limit=1&limit=500", headers=auth()), 400)
    assert doc["type"] == "urn:sorbrank:problem:repeated-parameter" and doc["parameter"] == "limit"


# -- gas names as intake stores them -------------------------------------------------

def test_adsorbate_filter_matches_the_canonical_gas_name(client):
    submit(client, csv_batch([isotherm("G1", 3.0, 0.1, adsorbate="co2"),
                              isotherm("G2", 2.0, 0.1, adsorbate="carbon dioxide"),
                              isotherm("G3", 1.0, 0.1, adsorbate="N2")]))
    every = [(r["sorbent_id"], r["adsorbate"]) for r in
             client.get("/api/v1/rankings", headers=auth()).json["rows"]]
    assert sorted(every) == [("G1", "CO2"), ("G2", "CO2"), ("G3", "N2")]  # intake's canonical ids
    for spelling in ("CO2", "co2", "Carbon Dioxide", " co2 "):
        doc = client.get("/api/v1/rankings", query_string={"adsorbate": spelling},
                         headers=auth()).json
        assert [r["sorbent_id"] for r in doc["rows"]] == ["G1", "G2"], spelling
        assert doc["adsorbate"] == "CO2"
    assert client.get("/api/v1/rankings?adsorbate=nitrogen", headers=auth()).json["total"] == 1
    # the HTML page filters the same way
    page = client.get("/?adsorbate=co2", headers=auth()).get_data(as_text=True)
    assert "G1" in page and "G2" in page and "G3" not in page


@pytest.mark.parametrize("name, suggested", [("C02", ["CO2"]), ("nitrogn", ["nitrogen"]),
                                             ("C4H10", ["n-C4H10", "i-C4H10"]),
                                             ("unobtainium", [])])
def test_unknown_gas_name_is_400_naming_it_with_intakes_suggestion(client, name, suggested):
    from sorbrank.worker.adsorbates import suggestions

    doc = assert_problem(client.get("/api/v1/rankings", query_string={"adsorbate": name},
                                    headers=auth()), 400)
    assert doc["type"] == "urn:sorbrank:problem:unknown-adsorbate"
    assert doc["parameter"] == "adsorbate" and doc["adsorbate"] == name and repr(name) in doc["detail"]
    # the same suggestions intake gives for the same name in a batch
    assert sorted(doc["suggestions"]) == sorted(suggestions(name)) == sorted(suggested)
    rejected = submit(client, csv_batch([isotherm("U1", 1.0, 0.1, adsorbate=name)]))
    message = rejected.json["issues"][0]["message"]
    assert all(s in message for s in suggested)
    assert assert_problem(client.get("/api/v1/rankings", query_string={
        "adsorbate": name, "format": "csv"}, headers=auth()), 400)["adsorbate"] == name


def test_a_declared_gas_is_found_by_its_name(client):
    body = csv_batch([isotherm("D1", 2.0, 0.1, adsorbate="Gas-X7")],
                     ) .replace(b"sorbent_id,", b"# gas: Gas-X7, molar_mass_g_per_mol=50\nsorbent_id,", 1)
    assert submit(client, body).status_code == 202
    for spelling in ("Gas-X7", "gas x7", "GASX7"):
        doc = client.get("/api/v1/rankings", query_string={"adsorbate": spelling}, headers=auth()).json
        assert [r["sorbent_id"] for r in doc["rows"]] == ["D1"], spelling
    assert_problem(client.get("/api/v1/rankings?adsorbate=Gas-X8", headers=auth()), 400)


# -- complete exports and paging -----------------------------------------------------

def _ranked_store(app, n: int, sorbent_prefix: str = "E") -> None:
    body = csv_batch([isotherm(f"{sorbent_prefix}{i:04d}", 1.0 + i / 100, 0.1) for i in range(n)])
    resp = submit(app.test_client(), body, query_string={"models": "langmuir"})
    assert resp.status_code == 202, resp.get_data(as_text=True)


def test_machine_formats_hold_every_row_json_pages_link_to_the_rest(tmp_path):
    app = make_app(tmp_path, chunk_size=50)
    _ranked_store(app, 230)
    client = app.test_client()
    want = [r["sorbent_id"] for r in client.get("/api/v1/rankings?limit=100000",
                                               headers=auth()).json["rows"]]
    assert len(want) == 230 and want == [f"E{i:04d}" for i in reversed(range(230))]
    for fmt in ("csv", "parquet", "arrow"):
        resp = client.get(f"/api/v1/rankings?format={fmt}", headers=auth())
        assert resp.status_code == 200 and resp.is_streamed, fmt
        table = read_table(resp.data, fmt)
        assert table["sorbent_id"].to_pylist() == want, fmt
        assert resp.headers["X-Total-Count"] == resp.headers["X-Returned-Count"] == "230"
        assert "Link" not in resp.headers
        cut = client.get(f"/api/v1/rankings?format={fmt}&limit=50&offset=200&sort="
                         "loading_ads_mol_per_kg", headers=auth())
        assert read_table(cut.data, fmt)["sorbent_id"].to_pylist() == want[200:230]
        assert cut.headers["X-Returned-Count"] == "30" and cut.headers["X-Total-Count"] == "230"
        assert '; rel="prev"' in cut.headers["Link"] and '; rel="next"' not in cut.headers["Link"]
    first = client.get("/api/v1/rankings?sort=loading_ads_mol_per_kg&flag=x&flag=y&all=false",
                       headers=auth())
    doc = first.json
    assert doc["total"] == 0 and doc["links"] == {} and "Link" not in first.headers
    page = client.get("/api/v1/rankings?sort=loading_ads_mol_per_kg&order=desc", headers=auth())
    assert page.json["returned"] == 100 and page.json["total"] == 230
    links = page.json["links"]
    assert links["next"] == ("/api/v1/rankings?sort=loading_ads_mol_per_kg&order=desc&offset=100")
    assert links["last"].endswith("offset=200") and "prev" not in links
    assert f'<{links["next"]}>; rel="next"' in page.headers["Link"]


def read_table(data: bytes, fmt: str):
    import pyarrow as pa
    import pyarrow.csv as pacsv

    if fmt == "csv":
        return pacsv.read_csv(io.BytesIO(data))
    if fmt == "parquet":
        return pq.read_table(io.BytesIO(data))
    with pa.ipc.open_stream(data) as reader:
        return reader.read_all()


def test_a_ranking_streams_in_parts_as_row_groups_and_record_batches(tmp_path):
    import pyarrow as pa

    from sorbrank.service.api.export import arrow_chunks, csv_chunks, parquet_chunks
    from sorbrank.worker.store import RankingQuery, ranking
    from sorbrank.worker.store.rankings import ranking_stream

    app = make_app(tmp_path, chunk_size=40)
    _ranked_store(app, 250)
    store = Store(tmp_path / "data")
    whole = ranking(store, RankingQuery(limit=None)).page
    assert whole.num_rows == 250
    for offset, limit in ((0, None), (30, None), (7, 111)):
        stream = ranking_stream(store, RankingQuery(limit=limit, offset=offset), part_rows=60)
        parts = list(stream.parts)
        expected = whole.slice(offset, limit)
        assert stream.total == 250 and stream.returned == expected.num_rows
        assert [p.num_rows for p in parts][:-1] == [60] * (len(parts) - 1)
        assert all(p.schema.equals(stream.schema) for p in parts)
        assert pa.concat_tables(parts).equals(expected)
    stream = ranking_stream(store, RankingQuery(limit=None), part_rows=60)
    parts = list(stream.parts)
    chunks = list(parquet_chunks(stream.schema, iter(parts)))
    assert len(chunks) == len(parts) + 1 and all(chunks[:-1])  # bytes leave after every part
    written = pq.ParquetFile(io.BytesIO(b"".join(chunks)))
    assert [written.metadata.row_group(i).num_rows for i in range(written.num_row_groups)] == \
        [p.num_rows for p in parts]
    assert written.read().equals(whole)
    with pa.ipc.open_stream(b"".join(arrow_chunks(stream.schema, iter(parts)))) as reader:
        batches = list(reader)
    assert [b.num_rows for b in batches] == [p.num_rows for p in parts]
    csv_parts = list(csv_chunks(stream.schema, iter(parts)))
    assert csv_parts[0].decode().splitlines() == [",".join(stream.schema.names)]  # the header once
    assert len(csv_parts) == len(parts) + 1
    read = read_table(b"".join(csv_parts), "csv")
    assert read.num_rows == 250 and read["sorbent_id"].to_pylist() == whole["sorbent_id"].to_pylist()


def test_page_links_keep_the_other_parameters(app):
    from sorbrank.service.api.export import page_links, paging_headers

    with app.test_request_context("/api/v1/rankings?adsorbate=CO2&flag=a&flag=b&offset=300&limit=100"):
        links = page_links(733, 300, 100)
        assert links == {
            "first": "/api/v1/rankings?adsorbate=CO2&flag=a&flag=b&limit=100&offset=0",
            "prev": "/api/v1/rankings?adsorbate=CO2&flag=a&flag=b&limit=100&offset=200",
            "next": "/api/v1/rankings?adsorbate=CO2&flag=a&flag=b&limit=100&offset=400",
            "last": "/api/v1/rankings?adsorbate=CO2&flag=a&flag=b&limit=100&offset=700"}
        assert page_links(733, 0, None) == {} and page_links(0, 0, 100) == {}
        headers = paging_headers(733, 700, 100)
        assert headers["X-Returned-Count"] == "33" and headers["X-Total-Count"] == "733"
        assert page_links(100, 0, 100) == {} and page_links(101, 0, 100)["last"].endswith("offset=100")
    with app.test_request_context("/api/v1/rankings?format=csv&offset=700"):
        # every row from offset on: the rows before it are one link away
        assert page_links(733, 700, None) == {"first": "/api/v1/rankings?format=csv&offset=0"}
        assert "Link" in paging_headers(733, 700, None)


def test_batch_list_pages_link_to_the_rest(client):
    for i in range(5):
        submit(client, csv_batch([isotherm(f"L{i}", 2.0, 0.1)]))
    seen, url = [], "/api/v1/batches?limit=2&state=done"
    while url:
        resp = client.get(url, headers=auth())
        doc = resp.json
        assert doc["total"] == 5 and resp.headers["X-Total-Count"] == "5"
        seen += [b["batch_id"] for b in doc["batches"]]
        url = doc["links"].get("next")
        assert (url is None) == ('rel="next"' not in resp.headers.get("Link", ""))
    assert len(seen) == len(set(seen)) == 5 and seen == sorted(seen, reverse=True)
