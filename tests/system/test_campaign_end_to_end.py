"""The whole sample campaign through the real service: a real ``sorbrank serve``
process (embedded mode), every batch file posted over HTTP, results read back
over HTTP and compared with the campaign's saved ground truth.

The campaign is invented, truth-known synthetic data (sample_batches/generate.py);
the tolerances are the ones the generator states in ground_truth.json.
"""
from __future__ import annotations

import json
import math
from pathlib import Path

import pytest

from sorbrank.service.client import Client
from conftest import clean_env, start_server

ROOT = Path(__file__).resolve().parents[2]
SAMPLES = ROOT / "sample_batches"

pytestmark = pytest.mark.integration


@pytest.fixture(scope="module")
def campaign(tmp_path_factory):
    truth = json.loads((SAMPLES / "ground_truth.json").read_text())
    base = tmp_path_factory.mktemp("campaign")
    env = clean_env(SORBRANK_DATA_DIR=str(base / "data"), PYTHONPATH=str(ROOT))
    procs = []
    try:
        _, url = start_server(env, base / "logs", procs)
        client = Client(url)
        replies = {}
        for path in sorted(SAMPLES.iterdir()):
            if path.suffix in (".csv", ".json", ".parquet") and not path.name.startswith(
                    ("ground_truth", "_")):
                replies[path.name] = client.submit_file(path)
        summaries, sorbents = {}, []
        for name, reply in replies.items():
            status = client.wait(reply["batch_id"], timeout_s=900)
            assert status["state"] == "done", (name, status)
            doc = client._get_json(f"/batches/{reply['batch_id']}/results",
                                   {"format": "json", "table": "summary"})
            for row in doc["summary"]:
                summaries[row["isotherm_id"]] = row
            sorbents += client._get_json(f"/batches/{reply['batch_id']}/results",
                                          {"format": "json", "table": "sorbents"})["sorbents"]
        yield truth, replies, summaries, sorbents
    finally:
        for proc in reversed(procs):
            proc.stop()


def test_every_good_dataset_is_accepted_and_fitted(campaign):
    truth, _, summaries, _ = campaign
    missing = [t["isotherm_id"] for t in truth["isotherms"] if t["isotherm_id"] not in summaries]
    assert missing == []
    no_model = [i for i, row in summaries.items() if row["best_model"] is None]
    assert len(no_model) <= 0.01 * len(summaries), no_model[:10]


def test_recovered_capacities_match_the_ground_truth(campaign):
    truth, _, summaries, _ = campaign
    rule = truth["tolerances"]["q_sat"]
    cases = [t for t in truth["isotherms"] if t.get("capacity_resolvable")]
    assert len(cases) > 1000
    within = []
    for t in cases:
        got = summaries[t["isotherm_id"]]["q_sat_mol_per_kg"]
        within.append(got is not None and math.isfinite(got)
                      and abs(got - t["q_sat_mol_per_kg"]) <= rule["relative"] * t["q_sat_mol_per_kg"])
    share = sum(within) / len(within)
    assert share >= rule["campaign_pass_fraction"], f"{share:.3f} of q_sat within {rule['relative']:.0%}"


def test_bet_areas_match_the_ground_truth(campaign):
    # every reported area within the stated 5 %; where no p/p0 range passes the
    # four criteria and R2 >= 0.9995 on noisy data the area is withheld and
    # flagged, never a silent number - we require that to stay rare (<= 10 %)
    truth, _, summaries, _ = campaign
    tol = truth["tolerances"]["bet_area"]["relative"]
    cases = [t for t in truth["isotherms"] if t.get("bet_area_m2_per_g") is not None]
    assert len(cases) == 60
    off, withheld = [], []
    for t in cases:
        row = summaries[t["isotherm_id"]]
        got = row["bet_area_m2_per_g"]
        if got is None:
            assert "bet_no_valid_range" in row["quality_flags"]
            withheld.append(t["isotherm_id"])
        elif abs(got - t["bet_area_m2_per_g"]) > tol * t["bet_area_m2_per_g"]:
            off.append((t["isotherm_id"], got, t["bet_area_m2_per_g"]))
    assert off == []
    assert len(withheld) <= 0.10 * len(cases), withheld


def test_every_bad_dataset_gets_its_expected_outcome(campaign):
    truth, replies, summaries, _ = campaign
    rejected_codes: dict[str, set[str]] = {}
    for reply in replies.values():
        for issue in reply["rejected"]:
            rejected_codes.setdefault(issue["isotherm"], set()).add(issue["code"])
    for bad in truth["bad_datasets"]:
        if bad["expected"] == "rejected":
            assert bad["code"] in rejected_codes.get(bad["isotherm_id"], set()), bad
            assert bad["isotherm_id"] not in summaries
        else:
            assert bad["code"] in summaries[bad["isotherm_id"]]["quality_flags"], bad


def test_isosteric_heats_match_the_ground_truth(campaign):
    # single-site sorbents have a loading-independent heat (van 't Hoff
    # affinity, constant q_sat); tolerance: the larger of 2.5 kJ/mol and 10 %
    truth, _, _, sorbents = campaign
    rule = truth["tolerances"]["isosteric_heat"]
    got = {(m["sorbent_id"], m["adsorbate"]): m for m in sorbents
           if m["kind"] == "isosteric_heat"}
    checked, off = 0, []
    for t in truth["isosteric_heats"]:
        row = got.get((t["sorbent_id"], t["adsorbate"]))
        if not t["constant_with_loading"] or row is None:
            continue
        checked += 1
        q = t["isosteric_heat_j_per_mol"]
        if abs(row["isosteric_heat_j_per_mol"] - q) > max(rule["absolute_j_per_mol"], rule["relative"] * q):
            off.append((t["sorbent_id"], t["adsorbate"], row["isosteric_heat_j_per_mol"], q))
    assert checked >= 300
    assert off == []


def test_iast_selectivities_match_the_ground_truth(campaign):
    # mixture requests travel in the JSON batch; the ground truth solves IAST on
    # the true pure-component models; tolerance 20 % where both pure-component
    # pressures lie inside the measured range
    truth, _, _, sorbents = campaign
    tol = truth["tolerances"]["iast_selectivity"]["relative"]
    mixtures = {m["name"]: m for m in truth["campaign"]["mixtures"]}
    got = {(m["sorbent_id"], m["adsorbate"], m["temperature_k"], round(m["total_pressure_pa"])): m
           for m in sorbents if m["kind"] == "iast"}
    checked, off = 0, []
    for t in truth["mixtures"]:
        mix = mixtures[t["mixture"]]
        row = got.get((t["sorbent_id"], "/".join(mix["components"]), mix["temperature_k"],
                       round(mix["total_pressure_pa"])))
        if not t["iast_resolvable"] or row is None:
            continue
        checked += 1
        if row["selectivity"] is None or abs(row["selectivity"] / t["selectivity"] - 1) > tol:
            off.append((t["sorbent_id"], t["mixture"], row["selectivity"], t["selectivity"]))
    assert checked >= 100
    assert off == []
