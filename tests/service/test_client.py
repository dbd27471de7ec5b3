"""``sorbrank.Client`` against a real ``sorbrank serve`` (embedded mode, real
HTTP, a subprocess on a free port), and what it says when nothing answers."""
from __future__ import annotations

import socket
import subprocess
import sys

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import sorbrank
from conftest import LOOPBACK, ROOT, TOKENS, clean_env, free_port, start_server, tokens_json
from sorbrank.service.client import ApiError, ServiceUnreachable
from api_truth import TRUTH, by_isotherm, frame, plain

pytestmark = pytest.mark.integration
SUBMITTER = TOKENS["submitter"][0]


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    base = tmp_path_factory.mktemp("client-server")
    env = clean_env(SORBRANK_DATA_DIR=str(base / "data"), SORBRANK_EMBEDDED_WORKERS="1",
                    SORBRANK_TOKENS=tokens_json(), PYTHONPATH=str(ROOT))
    procs = []
    try:
        _, url = start_server(env, base / "logs", procs)
        yield url
    finally:
        for proc in procs:
            proc.stop()


@pytest.fixture(scope="module")
def client(server):
    return sorbrank.Client(server, token=SUBMITTER)


@pytest.fixture(scope="module")
def local():
    """The same isotherms fitted locally: the numbers the service must give."""
    return by_isotherm(sorbrank.fit(frame()).summary)


def same_numbers(remote: pd.DataFrame, local: pd.DataFrame) -> None:
    remote = by_isotherm(remote)
    assert list(remote.isotherm_id) == list(local.isotherm_id)
    assert list(remote.best_model) == list(local.best_model)
    for column in ("q_sat_mol_per_kg", "henry_mol_per_kg_pa", "working_capacity_mol_per_kg"):
        assert remote[column].tolist() == pytest.approx(local[column].tolist(), rel=1e-12), column


def test_submit_a_dataframe_wait_and_read_results(client, local, capsys):
    batch = client.submit(frame(), batch_label="tg31-night-1")
    assert batch.accepted == len(TRUTH) and batch.rejected == []
    status = batch.wait(timeout_s=300, progress=True)
    assert status["state"] == "done"
    assert "[" + "#" * 30 + "]" in capsys.readouterr().err  # the finished progress bar
    summary = batch.results()
    assert isinstance(summary, pd.DataFrame) and len(summary) == len(TRUTH)
    assert summary["q_sat_mol_per_kg"].dtype == "float64"  # Parquet keeps the types
    same_numbers(summary, local)
    fits = batch.results("fits")
    assert len(fits) == len(batch.to_arrow("fits")) and len(fits) > len(TRUTH)
    assert isinstance(batch.to_arrow(), pa.Table)
    assert batch.status()["state"] == "done"
    with pytest.raises(ValueError, match="summary, fits, sorbents"):
        batch.results("everything")


def test_submit_a_path_with_declared_units_and_parquet_bytes(client, local, tmp_path):
    path = tmp_path / "tg31-night-2.csv"
    plain(frame()).to_csv(path, index=False)
    batch = client.submit(path, units={"pressure": "kPa", "loading": "mmol/g"})
    assert batch.accepted == len(TRUTH)
    assert batch.wait(timeout_s=300, progress=False)["state"] == "done"
    same_numbers(batch.results(), local)

    parquet = tmp_path / "tg31-night-3.parquet"
    pq.write_table(pa.Table.from_pandas(frame(), preserve_index=False), parquet)
    batch = client.submit(parquet.read_bytes())
    assert batch.wait(timeout_s=300, progress=False)["state"] == "done"
    same_numbers(batch.results(), local)


def test_rankings_come_back_as_a_dataframe(client):
    client.submit(frame()).wait(timeout_s=300, progress=False)
    ranked = client.rankings(adsorbate="CO2", temperature_k=298.15, sort="q_sat_mol_per_kg",
                             limit=10)
    assert isinstance(ranked, pd.DataFrame)
    # latest wins: one row per sorbent at 298.15 K, however many batches measured it
    assert list(ranked.sorbent_id) == ["TG31-0001", "TG31-0002"]
    assert ranked.q_sat_mol_per_kg.tolist() == pytest.approx([4.2, 2.6], rel=1e-6)
    one = client.rankings(adsorbate="CO2", sorbent_id="TG31-0002", order="asc")
    assert one.temperature_k.tolist() == [298.15]
    assert len(client.rankings(adsorbate="CO2", temperature_k=298.15, all=True)) > 2
    with pytest.raises(ValueError, match="sorbent"):
        client.rankings(sorbnet_id="TG31-0002")


def test_bad_rows_are_listed_with_row_and_field(client):
    df = frame()
    df["loading_mmol_per_g"] = df["loading_mmol_per_g"].astype(object)
    df.loc[14, "loading_mmol_per_g"] = "n/a"
    batch = client.submit(df)
    assert batch.accepted == len(TRUTH) - 1
    issue = next(i for i in batch.rejected if i["code"] == "not_a_number")
    assert issue["row"] == 15 and issue["field"] == "loading_mmol_per_g"
    with pytest.raises(ApiError) as info:
        client.submit(plain(frame()))  # no units anywhere: nothing is acceptable
    assert info.value.status == 422


def test_a_missing_token_is_an_api_error_not_a_crash(server):
    with pytest.raises(ApiError) as info:
        sorbrank.Client(server).submit(frame())
    assert info.value.status == 401


def test_what_is_not_a_batch_is_refused_before_sending(client, tmp_path):
    with pytest.raises(TypeError, match="DataFrame, a pyarrow Table, a path or bytes"):
        client.submit(42)
    with pytest.raises(ValueError, match="unknown batch file type"):
        client.submit(tmp_path / "notes.txt")


def refused_url() -> str:
    return f"http://{LOOPBACK}:{free_port()}"  # a port nothing listens on


def test_connection_refused_says_how_to_start_a_service():
    url = refused_url()
    with pytest.raises(ServiceUnreachable) as info:
        sorbrank.Client(url).rankings()
    message = str(info.value)
    assert f"no sorbrank service answers at {url}" in message
    assert "connection refused" in message
    assert "sorbrank serve" in message and "SORBRANK_URL" in message and "--url" in message
    assert "urlopen error" not in message
    assert isinstance(info.value, ConnectionError)


def test_unknown_host_and_silence_are_named_too():
    with pytest.raises(ServiceUnreachable, match="unknown host"):
        sorbrank.Client("http://no-such-host.invalid:8000").batch("b-1")
    with socket.socket() as silent:  # accepts connections, never answers
        silent.bind((LOOPBACK, 0))
        silent.listen(8)
        url = f"http://{LOOPBACK}:{silent.getsockname()[1]}"
        with pytest.raises(ServiceUnreachable, match=r"no answer within 0\.5 s"):
            sorbrank.Client(url, timeout_s=0.5).batch("b-1")


def cli(*args: str, **env: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "sorbrank.service.cli", *args],
                          capture_output=True, text=True, timeout=300,
                          env=clean_env(PYTHONPATH=str(ROOT), **env))


def test_cli_prints_the_message_without_a_traceback(tmp_path):
    url = refused_url()
    rank = cli("rank", "--url", url)
    assert rank.returncode == 1
    assert f"no sorbrank service answers at {url}" in rank.stderr
    assert "Traceback" not in rank.stderr and "urlopen error" not in rank.stderr
    path = tmp_path / "tg31.csv"
    frame().to_csv(path, index=False)
    submit = cli("submit", str(path), SORBRANK_URL=url)
    assert submit.returncode == 1
    assert f"no sorbrank service answers at {url}" in submit.stderr
    assert "Traceback" not in submit.stderr


def test_cli_submit_and_rank_use_the_same_client(server, tmp_path):
    path = tmp_path / "tg31-plain.csv"
    plain(frame()).to_csv(path, index=False)
    submit = cli("submit", str(path), "--pressure-unit", "kPa", "--loading-unit", "mmol/g",
                 "--wait", "--url", server, "--token", SUBMITTER)
    assert submit.returncode == 0, submit.stderr
    batch_id = submit.stdout.split("\t")[0]
    assert f"accepted {len(TRUTH)}" in submit.stdout and "\tdone " in submit.stdout
    rank = cli("rank", "--adsorbate", "N2", "--format", "csv", "--url", server,
               SORBRANK_TOKEN=SUBMITTER)
    assert rank.returncode == 0, rank.stderr
    assert "sorbent_id" in rank.stdout.splitlines()[0].split(",")
    assert "TG31-0002" in rank.stdout
    client = sorbrank.Client(server, token=SUBMITTER)
    assert client.batch(batch_id)["state"] == "done"
