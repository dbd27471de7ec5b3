"""``sorbrank migrate-store``: stores of schema version 1 (``material_id``,
``materials/``) and 2 (columns that vary per batch: ``flags``, per-pressure
``loading_at_<P>_pa_*`` columns, text columns typed null, only the fitted
models' parameter columns) are refused with a pointer to the command,
rewritten to version 3 file by file, and then read exactly like the store the
current code writes.

The older stores are made the way the older code wrote them: version 1 as
commit 5fc6bc1's worker/store.py and worker/jobs.py did (``material_id``,
``materials/``, schema-version metadata "1", manifests with
``chunks[].materials`` and ``mixtures[].material_id``), version 2 as commit
ffce067's worker/pipeline.py did (see ``as_version_2``). Each is built from a
store the current code wrote, so after the migration every table must equal
that original row for row. Where the repository's history is at hand, stores
written by the version-1 and version-2 code themselves (run from those
revisions) are migrated and read as well.
"""
from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from conftest import ROOT, clean_env

from sorbrank.service.cli import main
from sorbrank.worker import jobs, store_migration
from sorbrank.worker.isotherm import Batch, Isotherm, MixtureRequest
from sorbrank.worker.store import (SCHEMA_VERSION_KEY, TABLES, RankingQuery, Store, StoreError,
                                   rankings, table_to_isotherms)

PRESSURES_PA = np.array([2e3, 5e3, 1e4, 2e4, 4e4, 6e4, 8e4, 1e5])
OPTIONS = {"models": ["langmuir", "sips"]}


def campaign_batch(label: str, scale: float) -> Batch:
    """Tideglass-31 (invented): Langmuir isotherms of three sorbents, two gases
    at two temperatures each, so isosteric heat and IAST give sorbent rows."""
    isotherms = []
    for k, sorbent in enumerate(("TG31-A", "TG31-B", "TG31-C")):
        for gas, q_sat, b_per_pa in (("CO2", 4.0, 4e-5), ("N2", 2.0, 2e-6)):
            for temperature_k in (273.15, 298.15):
                b = b_per_pa * (1 + k) * np.exp(2500.0 * (1 / temperature_k - 1 / 298.15))
                loading = scale * q_sat * b * PRESSURES_PA / (1 + b * PRESSURES_PA)
                isotherms.append(Isotherm(
                    isotherm_id=f"{label}-{sorbent}-{gas}-{temperature_k}",
                    sorbent_id=sorbent, adsorbate=gas, temperature_k=temperature_k,
                    pressure_pa=PRESSURES_PA.copy(), loading_mol_per_kg=loading,
                    batch_label=label,
                    original={"pressure_pa": PRESSURES_PA.tolist(), "loading": loading.tolist()}))
    return Batch(label=label, isotherms=isotherms, mixtures=[MixtureRequest(
        sorbent_id=None, components=["CO2", "N2"], mole_fractions=[0.15, 0.85],
        total_pressure_pa=1e5, temperature_k=298.15)])


def current_store(root: Path) -> tuple[Store, list[str]]:
    """Two batches written by the current code; the last chunk of the second
    is left unrun (an unfinished batch must resume after the migration)."""
    store = Store(root)
    batch_ids = []
    for label, scale in (("run-1", 1.0), ("run-2", 1.1)):
        manifest = jobs.accept_batch(store, campaign_batch(label, scale), options=OPTIONS,
                                     chunk_size=4)
        batch_ids.append(manifest["batch_id"])
        chunks = manifest["chunks"] if label == "run-1" else manifest["chunks"][:-1]
        for chunk in chunks:
            jobs.run_chunk(store, manifest["batch_id"], chunk["index"])
    return store, batch_ids


def table_files(root: Path) -> list[Path]:
    """The data files of the store's tables (other Parquet files, e.g. an
    index kept beside them, are not the tables)."""
    return sorted(p for table in (*TABLES, "materials") for p in root.glob(f"{table}/*/*.parquet"))


def as_version_2(root: Path) -> None:
    """Rewrite a version-3 store the way the version-2 code laid it out: the
    flags column named ``flags``; the summaries' reference loadings as one
    column per pressure (``loading_at_<P>_pa_mol_per_kg``, and its averaged
    figure, standard error and interval); a column all null in a file typed
    null; in fits only the parameter columns of the models the file holds;
    no schema_version.json."""
    from sorbrank.worker.metrics.common import pressure_label
    from sorbrank.worker.models import CATALOGUE

    for path in table_files(root):
        data = pq.read_table(path, partitioning=None)
        meta = dict(data.schema.metadata)
        meta[SCHEMA_VERSION_KEY] = b"2"
        data = data.rename_columns(["flags" if n == "quality_flags" else n
                                    for n in data.column_names])
        if "reference_pressures_pa" in data.column_names:
            pressures = data["reference_pressures_pa"].to_pylist()[0]
            for list_name, template in (
                    ("reference_loadings_mol_per_kg", "loading_at_{p}_pa_mol_per_kg"),
                    ("reference_loadings_averaged_mol_per_kg",
                     "loading_at_{p}_pa_averaged_mol_per_kg"),
                    ("reference_loadings_averaged_stderr_mol_per_kg",
                     "loading_at_{p}_pa_averaged_stderr_mol_per_kg"),
                    ("reference_loadings_averaged_ci95_low_mol_per_kg",
                     "loading_at_{p}_pa_averaged_ci95_low_mol_per_kg"),
                    ("reference_loadings_averaged_ci95_high_mol_per_kg",
                     "loading_at_{p}_pa_averaged_ci95_high_mol_per_kg")):
                rows = data[list_name].to_pylist()
                for j, p in enumerate(pressures):
                    data = data.append_column(template.format(p=pressure_label(p)), pa.array(
                        [None if r is None else r[j] for r in rows], pa.float64()))
            data = data.drop_columns(["reference_pressures_pa"] + [
                n for n in data.column_names if n.startswith("reference_loadings_")])
        if "model" in data.column_names:  # fits: the fitted models' parameters only
            names = {p.name for m in set(data["model"].to_pylist()) for p in CATALOGUE[m].params}
            prefixes = ("param_", "stderr_", "ci95_low_", "ci95_high_", "at_bound_")
            data = data.drop_columns([
                n for n in data.column_names for prefix in prefixes
                if n.startswith(prefix) and n.removeprefix(prefix) not in names])
        for i, fld in enumerate(data.schema):
            if data[fld.name].null_count == data.num_rows and not pa.types.is_list(fld.type) \
                    and data.num_rows:
                data = data.set_column(i, fld.name, pa.nulls(data.num_rows))
        pq.write_table(data.replace_schema_metadata(meta), path)
    (root / "schema_version.json").unlink()


def as_version_1(root: Path) -> None:
    """Rewrite a version-3 store the way the version-1 code laid it out."""
    as_version_2(root)
    for path in table_files(root):
        data = pq.read_table(path, partitioning=None)
        meta = dict(data.schema.metadata)
        meta[SCHEMA_VERSION_KEY] = b"1"
        names = ["material_id" if n == "sorbent_id" else n for n in data.column_names]
        pq.write_table(data.rename_columns(names).replace_schema_metadata(meta), path)
    (root / "sorbents").rename(root / "materials")
    for path in root.glob("batches/*/manifest.json"):
        manifest = json.loads(path.read_text())
        for chunk in manifest["chunks"]:
            chunk["materials"] = chunk.pop("sorbents")
        for mixture in manifest["mixtures"]:
            mixture["material_id"] = mixture.pop("sorbent_id")
        path.write_text(json.dumps(manifest, indent=1, sort_keys=True))


def snapshot(root: Path) -> dict[str, bytes]:
    return {str(p.relative_to(root)): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


@pytest.fixture
def stores(tmp_path):
    """(the version-3 original, its version-1 copy, the batch ids)."""
    original, batch_ids = current_store(tmp_path / "v3")
    shutil.copytree(tmp_path / "v3", tmp_path / "v1")
    as_version_1(tmp_path / "v1")
    assert not list((tmp_path / "v1").rglob("*sorbent*"))
    assert (tmp_path / "v1" / "materials").is_dir()
    return original, tmp_path / "v1", batch_ids


@pytest.fixture
def v2_stores(tmp_path):
    """(the version-3 original, its version-2 copy, the batch ids)."""
    original, batch_ids = current_store(tmp_path / "v3")
    shutil.copytree(tmp_path / "v3", tmp_path / "v2")
    as_version_2(tmp_path / "v2")
    summary = pq.read_schema(sorted((tmp_path / "v2").glob("summaries/*/*.parquet"))[0])
    assert "loading_at_10000_pa_mol_per_kg" in summary.names and "flags" in summary.names
    assert any(pa.types.is_null(f.type) for f in summary)  # what broke plain-glob readers
    return original, tmp_path / "v2", batch_ids


def migrate(root: Path | str, capsys) -> tuple[int, str, str]:
    code = main(["migrate-store", "--data-dir", str(root)])
    out = capsys.readouterr()
    return code, out.out, out.err


def same(a: pa.Table, b: pa.Table) -> bool:
    """Equal schemas and values, NaN equal to NaN (``Table.equals`` says NaN != NaN)."""
    def ipc(table):
        sink = pa.BufferOutputStream()
        with pa.ipc.new_stream(sink, table.schema) as writer:
            writer.write_table(table.combine_chunks())
        return sink.getvalue().to_pybytes()
    return a.schema.equals(b.schema, check_metadata=True) and ipc(a) == ipc(b)


def assert_reads_like(original: Store, migrated: Store, batch_ids: list[str]) -> None:
    for table in TABLES:
        for batch_id in batch_ids:
            want = original.batch_table(table, batch_id)
            got = migrated.batch_table(table, batch_id)
            assert want.num_rows > 0, (table, batch_id)
            # row order across chunk files is the dataset's: compare in one order
            key = [(f.name, "ascending") for f in want.schema if not pa.types.is_nested(f.type)]
            assert same(got.sort_by(key), want.sort_by(key)), (table, batch_id)
    query = RankingQuery(limit=1000)
    assert same(rankings(migrated, query)[0], rankings(original, query)[0])
    assert rankings(migrated, query)[1] == rankings(original, query)[1] > 0
    for path in table_files(Path(migrated.root)):
        assert pq.read_schema(path).metadata[SCHEMA_VERSION_KEY] == b"3", path
    for batch_id in batch_ids:
        assert migrated.read_manifest(batch_id) == original.read_manifest(batch_id)
        first = migrated.read_chunk("inputs", batch_id, 0)
        assert [i.sorbent_id for i in table_to_isotherms(first)] == \
            [i.sorbent_id for i in table_to_isotherms(original.read_chunk("inputs", batch_id, 0))]


def test_a_version_1_store_is_refused_with_the_command_to_run(stores):
    from sorbrank.service.config import Settings, store_problem

    _, root, batch_ids = stores
    store = Store(root)
    for read in (lambda: rankings(store, RankingQuery()),
                 lambda: store.batch_table("summaries", batch_ids[0]),
                 lambda: store.query("sorbents"),
                 lambda: store.read_chunk("inputs", batch_ids[0], 0)):
        with pytest.raises(StoreError, match="sorbrank migrate-store --data-dir"):
            read()
    # 'sorbrank serve' and 'sorbrank worker' refuse to start on it
    assert "sorbrank migrate-store" in store_problem(Settings(data_dir=root))
    # rankings find an old file even where no materials/ directory is left
    shutil.rmtree(root / "materials")
    with pytest.raises(StoreError, match="material_id"):
        rankings(Store(root), RankingQuery())


def test_migration_rewrites_a_version_1_store_and_a_second_run_does_nothing(stores, capsys):
    original, root, batch_ids = stores
    code, out, err = migrate(root, capsys)
    assert code == 0, err
    n_files = len(table_files(root))
    assert f"{len(list(root.glob('sorbents/*/*.parquet')))} Parquet files moved" in out
    assert "2 batch manifests updated" in out and "removed materials/" in out
    assert not (root / "materials").exists()
    assert Store(root).schema_problem() is None
    assert_reads_like(original, Store(root), batch_ids)

    before = snapshot(root)
    code, out, err = migrate(root, capsys)
    assert code == 0, err
    assert out.startswith("nothing to do") and f"({n_files} Parquet files checked)" in out
    assert snapshot(root) == before


def test_a_store_named_by_a_uri_migrates_through_pyarrow_fs(stores, capsys):
    # every file operation of the migration goes through the store's
    # pyarrow.fs filesystem, as the store's own do (docs/operations.md, "Storage URIs")
    original, root, batch_ids = stores
    code, out, err = migrate(f"file://{root}", capsys)
    assert code == 0 and "removed materials/" in out, err
    assert_reads_like(original, Store(f"file://{root}"), batch_ids)


def test_an_unfinished_batch_resumes_after_the_migration(stores, capsys):
    original, root, batch_ids = stores
    assert migrate(root, capsys)[0] == 0
    store = Store(root)
    last = store.read_manifest(batch_ids[1])["chunks"][-1]["index"]
    assert jobs.batch_status(store, batch_ids[1])["state"] != "done"
    jobs.run_chunk(store, batch_ids[1], last)  # needs the manifest's mixtures as sorbent_id
    jobs.run_chunk(original, batch_ids[1], last)
    assert jobs.batch_status(store, batch_ids[1])["state"] == "done"
    assert_reads_like(original, store, batch_ids)


class Killed(BaseException):
    """The process dies here (nothing below runs, no handler catches it)."""


@pytest.mark.parametrize("stop_after", [3, 11, "a sorbents copy"])
def test_a_migration_killed_half_way_is_completed_by_the_next_run(stores, capsys, monkeypatch,
                                                                  stop_after):
    original, root, batch_ids = stores
    real_write = store_migration._write
    writes = []

    def write_then_die(store, path, data):
        real_write(store, path, data)
        writes.append(path)
        # killed right after a write: either the n-th file, or a sorbents/
        # copy whose materials/ original is not yet deleted
        if len(writes) == stop_after or (stop_after == "a sorbents copy" and "/sorbents/" in path):
            raise Killed

    monkeypatch.setattr(store_migration, "_write", write_then_die)
    with pytest.raises(Killed):
        main(["migrate-store", "--data-dir", str(root)])
    capsys.readouterr()
    monkeypatch.undo()
    half_done = Store(root)
    assert half_done.schema_problem() is not None  # still refused, not half read
    with pytest.raises(StoreError):
        half_done.query("sorbents")
    code, out, err = migrate(root, capsys)
    assert code == 0, err
    assert_reads_like(original, Store(root), batch_ids)


def test_an_unknown_version_stops_the_migration_before_any_write(stores, capsys):
    _, root, _ = stores
    victim = sorted(root.glob("fits/*/*.parquet"))[-1]
    data = pq.read_table(victim, partitioning=None)
    pq.write_table(data.replace_schema_metadata({SCHEMA_VERSION_KEY: b"7"}), victim)
    before = snapshot(root)
    code, out, err = migrate(root, capsys)
    assert code == 2 and "version 7" in err and "nothing was changed" in err
    assert victim.name in err
    assert snapshot(root) == before


def test_no_store_at_the_path(tmp_path, capsys):
    code, _, err = migrate(tmp_path / "nothing-here", capsys)
    assert code == 2 and "no store at" in err


# -- a store written by the version-1 code itself --------------------------------

# the last revision whose code wrote schema version 1 (import names worker.*)
VERSION_1_REVISION = "5fc6bc1"
VERSION_1_WRITER = """
import sys
from worker import jobs
from worker.intake import read_batch
from worker.store import SCHEMA_VERSION, Store

assert SCHEMA_VERSION == "1"
store = Store(sys.argv[1])
batch = read_batch(sys.stdin.buffer.read(), "csv", batch_label="old")
assert not batch.rejected, batch.rejected
manifest = jobs.accept_batch(store, batch, options={"models": ["langmuir", "sips"]}, chunk_size=4)
for chunk in manifest["chunks"]:
    jobs.run_chunk(store, manifest["batch_id"], chunk["index"])
print(manifest["batch_id"])
"""


def version_1_code(target: Path) -> Path | None:
    """The version-1 code's worker/ folder, from the repository's history."""
    import io
    import tarfile

    if shutil.which("git") is None:
        return None
    done = subprocess.run(["git", "-C", str(ROOT), "archive", VERSION_1_REVISION, "worker"],
                          capture_output=True, timeout=60)
    if done.returncode != 0:  # e.g. a shallow clone without that revision
        return None
    with tarfile.open(fileobj=io.BytesIO(done.stdout)) as archive:
        archive.extractall(target, filter="data")
    return target


def test_a_store_the_version_1_code_wrote_reads_after_the_migration(tmp_path, capsys):
    code = version_1_code(tmp_path / "old-code")
    if code is None:
        pytest.skip(f"revision {VERSION_1_REVISION} is not in this clone's history")
    rows = ["material_id,adsorbate,temperature_k,pressure,loading,pressure_unit,loading_unit"]
    for batch in (campaign_batch("old", 1.0),):
        for iso in batch.isotherms:
            rows += [f"{iso.sorbent_id},{iso.adsorbate},{iso.temperature_k},{float(p)!r},"
                     f"{float(q)!r},Pa,mol/kg"
                     for p, q in zip(iso.pressure_pa, iso.loading_mol_per_kg)]
    root = tmp_path / "store"
    env = clean_env(PYTHONPATH=str(code))
    done = subprocess.run([sys.executable, "-c", VERSION_1_WRITER, str(root)], cwd=code, env=env,
                          input="\n".join(rows).encode() + b"\n", capture_output=True, timeout=300)
    assert done.returncode == 0, done.stderr.decode()[-3000:]
    batch_id = done.stdout.decode().split()[-1]
    assert (root / "materials").is_dir() and not (root / "sorbents").exists()
    with pytest.raises(StoreError, match="migrate-store"):
        rankings(Store(root), RankingQuery())

    code_, out, err = migrate(root, capsys)
    assert code_ == 0, err
    store = Store(root)
    assert jobs.batch_status(store, batch_id)["state"] == "done"
    page, total = rankings(store, RankingQuery(limit=100))
    assert total == 12 and set(page["sorbent_id"].to_pylist()) == {"TG31-A", "TG31-B", "TG31-C"}
    for table in TABLES:
        assert store.batch_table(table, batch_id).num_rows > 0, table
    isotherms = table_to_isotherms(store.read_chunk("inputs", batch_id, 0))
    assert {i.sorbent_id for i in isotherms} <= {"TG31-A", "TG31-B", "TG31-C"}
    # the same data through the current code: the same isotherms, models and capacities
    current = Store(tmp_path / "now")
    manifest = jobs.accept_batch(current, campaign_batch("old", 1.0), options=OPTIONS, chunk_size=4)
    for chunk in manifest["chunks"]:
        jobs.run_chunk(current, manifest["batch_id"], chunk["index"])
    key = [(c, "ascending") for c in ("sorbent_id", "adsorbate", "temperature_k")]
    a = store.batch_table("summaries", batch_id).sort_by(key)
    b = current.batch_table("summaries", manifest["batch_id"]).sort_by(key)
    assert a.num_rows == b.num_rows == 12
    for column in ("sorbent_id", "adsorbate", "temperature_k", "best_model"):
        assert a[column].to_pylist() == b[column].to_pylist(), column
    np.testing.assert_allclose(a["q_sat_mol_per_kg"].to_numpy(zero_copy_only=False),
                               b["q_sat_mol_per_kg"].to_numpy(zero_copy_only=False), rtol=1e-6)


# -- version 2 -> 3 ------------------------------------------------------------------

def test_a_version_2_store_is_refused_with_the_command_to_run(v2_stores):
    from sorbrank.service.config import Settings, store_problem

    _, root, batch_ids = v2_stores
    store = Store(root)
    problem = store.schema_problem()
    assert "schema version 2" in problem and f"sorbrank migrate-store --data-dir {root}" in problem
    # 'sorbrank serve' refuses to start on it; a worker refuses to add version-3 files to it
    assert "sorbrank migrate-store" in store_problem(Settings(data_dir=root))
    with pytest.raises(StoreError, match="sorbrank migrate-store --data-dir"):
        store.read_chunk("inputs", batch_ids[0], 0)
    last = store.read_manifest(batch_ids[1])["chunks"][-1]["index"]
    before = snapshot(root)
    with pytest.raises(StoreError, match="sorbrank migrate-store"):
        store.write_table("summaries", batch_ids[1], last, pa.table({"isotherm_id": ["x"]}))
    assert snapshot(root) == before


def test_migration_rewrites_a_version_2_store_and_a_second_run_does_nothing(v2_stores, capsys):
    import pandas

    original, root, batch_ids = v2_stores
    code, out, err = migrate(root, capsys)
    assert code == 0, err
    assert "summaries: " in out and "wrote schema_version.json" in out
    assert Store(root).schema_problem() is None
    assert_reads_like(original, Store(root), batch_ids)
    assert len(pandas.read_parquet(root / "summaries")) == rankings(
        original, RankingQuery(limit=0, all_results=True))[1]

    before = snapshot(root)
    code, out, err = migrate(root, capsys)
    assert code == 0 and out.startswith("nothing to do"), err
    assert snapshot(root) == before


def test_an_unfinished_version_2_batch_resumes_after_the_migration(v2_stores, capsys):
    original, root, batch_ids = v2_stores
    assert migrate(root, capsys)[0] == 0
    store = Store(root)
    last = store.read_manifest(batch_ids[1])["chunks"][-1]["index"]
    jobs.run_chunk(store, batch_ids[1], last)
    jobs.run_chunk(original, batch_ids[1], last)
    assert jobs.batch_status(store, batch_ids[1])["state"] == "done"
    assert_reads_like(original, store, batch_ids)


@pytest.mark.parametrize("stop_after", [1, 7])
def test_a_version_2_migration_killed_half_way_is_completed_by_the_next_run(
        v2_stores, capsys, monkeypatch, stop_after):
    original, root, batch_ids = v2_stores
    real_write = store_migration._write
    writes = []

    def write_then_die(store, path, data):
        real_write(store, path, data)
        writes.append(path)
        if len(writes) == stop_after:
            raise Killed

    monkeypatch.setattr(store_migration, "_write", write_then_die)
    with pytest.raises(Killed):
        main(["migrate-store", "--data-dir", str(root)])
    capsys.readouterr()
    monkeypatch.undo()
    assert Store(root).schema_problem() is not None  # still refused, not half read
    code, out, err = migrate(root, capsys)
    assert code == 0, err
    assert_reads_like(original, Store(root), batch_ids)


# the last revision whose code wrote schema version 2 (import names sorbrank.worker.*)
VERSION_2_REVISION = "ffce067"
VERSION_2_WRITER = """
import sys
import numpy as np
import sorbrank.worker
assert sorbrank.worker.__file__.startswith(sys.argv[2]), sorbrank.worker.__file__
from sorbrank.worker import jobs
from sorbrank.worker.isotherm import Batch, Conditions, Isotherm
from sorbrank.worker.store import SCHEMA_VERSION, Store

assert SCHEMA_VERSION == "2"
store = Store(sys.argv[1])
pressures = np.array([2e3, 5e3, 1e4, 2e4, 4e4, 6e4, 8e4, 1e5])
for label, refs in (("old-a", (1e4, 1e5)), ("old-b", (1.5e4,))):
    isotherms = [Isotherm(isotherm_id=f"{label}-{s}", sorbent_id=s, adsorbate="CO2",
                          temperature_k=298.15, pressure_pa=pressures.copy(),
                          loading_mol_per_kg=4.0 * 4e-5 * (1 + k) * pressures
                          / (1 + 4e-5 * (1 + k) * pressures), batch_label=label,
                          original={})
                 for k, s in enumerate(("TG31-A", "TG31-B", "TG31-C"))]
    batch = Batch(label=label, isotherms=isotherms,
                  conditions=Conditions(reference_pressures_pa=refs))
    manifest = jobs.accept_batch(store, batch, options={"models": ["langmuir", "sips"]},
                                 chunk_size=2)
    for chunk in manifest["chunks"]:
        jobs.run_chunk(store, manifest["batch_id"], chunk["index"])
    print(manifest["batch_id"])
"""


def version_2_code(target: Path) -> Path | None:
    """The version-2 code as the package ``sorbrank`` (its worker/ under sorbrank/)."""
    import io
    import tarfile

    if shutil.which("git") is None:
        return None
    done = subprocess.run(["git", "-C", str(ROOT), "archive", VERSION_2_REVISION, "worker",
                           "sorbrank"], capture_output=True, timeout=60)
    if done.returncode != 0:
        return None
    with tarfile.open(fileobj=io.BytesIO(done.stdout)) as archive:
        archive.extractall(target, filter="data")
    (target / "worker").rename(target / "sorbrank" / "worker")
    return target


def test_a_store_the_version_2_code_wrote_reads_after_the_migration(tmp_path, capsys):
    import pandas

    code = version_2_code(tmp_path / "old-code")
    if code is None:
        pytest.skip(f"revision {VERSION_2_REVISION} is not in this clone's history")
    root = tmp_path / "store"
    env = clean_env(PYTHONPATH=str(code))
    done = subprocess.run([sys.executable, "-c", VERSION_2_WRITER, str(root), str(code)],
                          cwd=code, env=env, capture_output=True, timeout=300)
    assert done.returncode == 0, done.stderr.decode()[-3000:]
    batch_ids = done.stdout.decode().split()
    names = {n for p in root.glob("summaries/*/*.parquet") for n in pq.read_schema(p).names}
    assert {"flags", "loading_at_15000_pa_mol_per_kg", "loading_at_10000_pa_mol_per_kg"} <= names
    assert "sorbrank migrate-store" in Store(root).schema_problem()
    # what a data team met: the summaries of batches with other reference
    # pressures do not open as one dataset
    import polars
    with pytest.raises(polars.exceptions.PolarsError):
        polars.scan_parquet(str(root / "summaries" / "*" / "*.parquet"),
                            hive_partitioning=True).collect()

    code_, out, err = migrate(root, capsys)
    assert code_ == 0, err
    store = Store(root)
    assert store.schema_problem() is None
    summaries = pandas.read_parquet(root / "summaries")  # one dataset now
    assert len(summaries) == 6
    for batch_id, refs in zip(batch_ids, ([1e4, 1e5], [1.5e4])):
        assert jobs.batch_status(store, batch_id)["state"] == "done"
        rows = store.batch_table("summaries", batch_id).to_pylist()
        assert [r["reference_pressures_pa"] for r in rows] == [refs] * 3
        for row in rows:  # the selected Langmuir's loading, recomputed from its fit
            fit = [f for f in store.batch_table("fits", batch_id).to_pylist()
                   if f["isotherm_id"] == row["isotherm_id"] and f["selected"]][0]
            q_sat, b = fit["param_q_sat"], fit["param_affinity"]
            if fit["model"] == "langmuir":
                np.testing.assert_allclose(row["reference_loadings_mol_per_kg"],
                                           [q_sat * b * p / (1 + b * p) for p in refs],
                                           rtol=1e-9)
            assert len(row["reference_loadings_averaged_mol_per_kg"]) == len(refs)
