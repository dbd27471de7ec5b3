"""Complete exports, paging and filters over HTTP to a real ``sorbrank serve``.

The store holds 733 CO2 rankings rows (submitted as ``co2`` and ``carbon
dioxide``, which intake stores as CO2) beside 40 N2 rows: more than one JSON
page (100 rows) and more than seven. Every machine format must hold all 733,
the JSON pages followed by their Link headers must give the same 733 in the
same order, and so must ``sorbrank.Client`` and ``sorbrank rank``. Link
headers are read with ``requests``' own RFC 8288 parser, not ours.
"""
from __future__ import annotations

import csv
import io
import json
import subprocess
import sys
import time

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import requests

import sorbrank
from conftest import ROOT, TOKENS, clean_env, csv_batch, isotherm, start_server, tokens_json
from sorbrank.service.api.params import ACCEPTED

pytestmark = pytest.mark.integration
READER = TOKENS["reader"][0]
CO2_ROWS, N2_ROWS = 733, 40


def co2_isotherms() -> list[dict]:
    # q_sat ascends with the index, so the default ranking (loading, descending) is
    # the reverse index order; two spellings of the same gas, as a rig might send them
    return [isotherm(f"X{i:04d}", 1.0 + i / 1000, 0.1,
                     adsorbate="co2" if i % 2 else "carbon dioxide") for i in range(CO2_ROWS)]


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    base = tmp_path_factory.mktemp("exports")
    env = clean_env(SORBRANK_DATA_DIR=str(base / "data"), SORBRANK_EMBEDDED_WORKERS="1",
                    SORBRANK_CHUNK_SIZE="200", SORBRANK_TOKENS=tokens_json(),
                    PYTHONPATH=str(ROOT))
    procs = []
    try:
        _, url = start_server(env, base / "logs", procs)
        s = session()
        ids = []
        for body in (csv_batch(co2_isotherms()),
                     csv_batch([isotherm(f"N{i:03d}", 2.0, 0.05, adsorbate="N2")
                                for i in range(N2_ROWS)])):
            resp = s.post(f"{url}/api/v1/batches", data=body, params={"models": "langmuir"},
                          headers={"Content-Type": "text/csv",
                                   "Authorization": f"Bearer {TOKENS['submitter'][0]}"})
            assert resp.status_code == 202, resp.text
            ids.append(resp.json()["batch_id"])
        deadline = time.monotonic() + 300
        while any(s.get(f"{url}/api/v1/batches/{b}").json()["state"] != "done" for b in ids):
            assert time.monotonic() < deadline, "batches not done in 300 s"
            time.sleep(0.5)
        yield url
    finally:
        for proc in procs:
            proc.stop()


def session() -> requests.Session:
    s = requests.Session()
    s.headers["Authorization"] = f"Bearer {READER}"
    return s


def read_table(resp: requests.Response, fmt: str) -> pa.Table:
    if fmt == "csv":
        rows = list(csv.reader(io.StringIO(resp.text)))
        return pa.table({name: [r[i] for r in rows[1:]] for i, name in enumerate(rows[0])})
    if fmt == "parquet":
        return pq.read_table(io.BytesIO(resp.content))
    with pa.ipc.open_stream(resp.content) as reader:
        return reader.read_all()


EXPECTED = [f"X{i:04d}" for i in reversed(range(CO2_ROWS))]


@pytest.mark.parametrize("fmt", ["csv", "parquet", "arrow"])
def test_machine_formats_return_every_matching_row_streamed(server, fmt):
    resp = session().get(f"{server}/api/v1/rankings", params={"adsorbate": "CO2", "format": fmt})
    assert resp.status_code == 200, resp.text
    table = read_table(resp, fmt)
    assert table.num_rows == CO2_ROWS
    assert table["sorbent_id"].to_pylist() == EXPECTED
    assert set(table["adsorbate"].to_pylist()) == {"CO2"}
    assert resp.headers["X-Total-Count"] == resp.headers["X-Returned-Count"] == str(CO2_ROWS)
    assert "Link" not in resp.headers
    # streamed: no length known up front, sent in chunks as it is written
    assert resp.headers.get("Transfer-Encoding") == "chunked" and "Content-Length" not in resp.headers
    # no filter: every row of both gases
    assert read_table(session().get(f"{server}/api/v1/rankings", params={"format": fmt}),
                      fmt).num_rows == CO2_ROWS + N2_ROWS


@pytest.mark.parametrize("fmt", ["csv", "parquet", "arrow"])
def test_machine_formats_honour_limit_and_offset_and_say_what_is_left_out(server, fmt):
    resp = session().get(f"{server}/api/v1/rankings", params={
        "adsorbate": "CO2", "format": fmt, "limit": 250, "offset": 600})
    table = read_table(resp, fmt)
    assert table["sorbent_id"].to_pylist() == EXPECTED[600:]
    assert resp.headers["X-Returned-Count"] == str(CO2_ROWS - 600)
    assert resp.headers["X-Total-Count"] == str(CO2_ROWS)
    assert set(resp.links) == {"first", "prev", "last"}
    before = session().get(server + resp.links["prev"]["url"])
    assert read_table(before, fmt)["sorbent_id"].to_pylist() == EXPECTED[350:600]


def test_json_pages_follow_link_to_the_same_rows(server):
    s = session()
    url, pages, rows = f"{server}/api/v1/rankings?adsorbate=co2&sort=loading_ads_mol_per_kg", 0, []
    while url:
        resp = s.get(url)
        assert resp.status_code == 200, resp.text
        doc = resp.json()
        assert doc["total"] == CO2_ROWS and int(resp.headers["X-Total-Count"]) == CO2_ROWS
        assert doc["returned"] == len(doc["rows"]) == int(resp.headers["X-Returned-Count"])
        assert doc["adsorbate"] == "CO2"
        rows += doc["rows"]
        pages += 1
        links = {rel: link["url"] for rel, link in resp.links.items()}
        assert links == doc["links"]  # the body says what the header says
        assert "adsorbate=co2" in links["first"] and "sort=loading_ads_mol_per_kg" in links["last"]
        url = server + links["next"] if "next" in links else None
    assert pages == 8 and len(rows) == CO2_ROWS
    assert [r["sorbent_id"] for r in rows] == EXPECTED
    last = s.get(f"{server}/api/v1/rankings", params={"adsorbate": "CO2", "offset": 700})
    assert last.json()["returned"] == 33 and "next" not in last.links and "prev" in last.links


def test_client_gets_every_row(server):
    client = sorbrank.Client(server, token=READER)
    frame = client.rankings(adsorbate="co2", sort="loading_ads_mol_per_kg")
    assert len(frame) == CO2_ROWS and frame.sorbent_id.tolist() == EXPECTED
    assert len(client.rankings(adsorbate="CO2", sort="loading_ads_mol_per_kg", limit=10)) == 10
    doc = client.rankings_document({"adsorbate": "carbon dioxide"})  # JSON pages, followed
    assert doc["returned"] == doc["total"] == CO2_ROWS
    assert [r["sorbent_id"] for r in doc["rows"]] == EXPECTED
    one_page = client.rankings_document({"adsorbate": "CO2", "limit": 100, "offset": 100})
    assert [r["sorbent_id"] for r in one_page["rows"]] == EXPECTED[100:200]
    batches = client.batches()
    assert len(batches) == 2 and all(b["state"] == "done" for b in batches)
    with pytest.raises(sorbrank.service.client.ApiError) as err:
        client.rankings(adsorbate="C02")
    assert err.value.status == 400 and err.value.problem["suggestions"] == ["CO2"]


def cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "sorbrank.service.cli", *args],
                          capture_output=True, text=True, timeout=120,
                          env=clean_env(PYTHONPATH=str(ROOT), SORBRANK_TOKEN=READER))


def test_cli_rank_gets_every_row_in_every_format(server):
    as_json = cli("rank", "--adsorbate", "co2", "--format", "json", "--url", server)
    assert as_json.returncode == 0, as_json.stderr
    doc = json.loads(as_json.stdout)
    assert [r["sorbent_id"] for r in doc["rows"]] == EXPECTED and doc["total"] == CO2_ROWS
    as_csv = cli("rank", "--adsorbate", "co2", "--format", "csv", "--url", server)
    rows = list(csv.DictReader(io.StringIO(as_csv.stdout)))
    assert [r["sorbent_id"] for r in rows] == EXPECTED
    table = cli("rank", "--adsorbate", "Carbon Dioxide", "--url", server)
    assert table.returncode == 0, table.stderr
    lines = table.stdout.splitlines()
    assert len(lines) == 2 + CO2_ROWS and lines[2].split()[:2] == ["1", EXPECTED[0]]
    assert f"{CO2_ROWS} of {CO2_ROWS} matching rows" in table.stderr
    few = cli("rank", "--adsorbate", "CO2", "--limit", "5", "--offset", "10", "--url", server)
    assert len(few.stdout.splitlines()) == 2 + 5 and f"5 of {CO2_ROWS} matching rows" in few.stderr
    wrong = cli("rank", "--adsorbate", "C02", "--url", server)
    assert wrong.returncode == 1 and "'C02'" in wrong.stderr and "'CO2'" in wrong.stderr


def test_unknown_parameters_are_refused_over_http(server):
    s = session()
    resp = s.get(f"{server}/api/v1/rankings", params={"adsorbat": "CO2"})
    assert resp.status_code == 400 and resp.headers["Content-Type"] == "application/problem+json"
    doc = resp.json()
    assert doc["type"] == "urn:sorbrank:problem:unknown-parameter"
    assert doc["unknown"] == ["adsorbat"] and "adsorbat" in doc["detail"]
    assert doc["accepted"] == [p.name for p in ACCEPTED["rankings.get_rankings"]]
    for path in ("/api/v1/batches", "/api/v1/models", "/api/v1/sorbents/X0001", "/healthz", "/"):
        assert s.get(server + path, params={"adsorbat": "CO2"}).status_code == 400, path


def test_gas_names_match_in_canonical_form(server):
    s = session()

    def ids(name: str) -> list[str]:
        resp = s.get(f"{server}/api/v1/rankings", params={"adsorbate": name, "format": "arrow"})
        assert resp.status_code == 200, resp.text
        return read_table(resp, "arrow")["isotherm_id"].to_pylist()

    upper = ids("CO2")
    assert len(upper) == CO2_ROWS and ids("co2") == upper == ids("carbon dioxide")
    assert len(ids("nitrogen")) == N2_ROWS
    unknown = s.get(f"{server}/api/v1/rankings", params={"adsorbate": "C02"})
    assert unknown.status_code == 400 and unknown.json()["adsorbate"] == "C02"
