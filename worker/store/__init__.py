"""The store: a Parquet dataset plus small JSON manifests under one root.

Layout (``<table>`` is inputs, summaries, fits or sorbents)::

    <root>/<table>/batch_id=<id>/chunk-00003.parquet   hive-partitioned by batch
    <root>/batches/<id>/manifest.json                  written once, at acceptance
    <root>/batches/<id>/chunk-00003.json               chunk status (running/done/failed)
    <root>/batches/<id>/final.json                     written when every chunk is settled
    <root>/idempotency/<sha256 of key>.json            Idempotency-Key -> batch id
    <root>/quarantine/<id>/<table>.chunk-00003.<UTC time>.parquet   a damaged file, moved
    <root>/quarantine/<id>/<table>.chunk-00003.<UTC time>.json      why, and when

A data file a reader cannot read whole, that lacks the schema version, or whose
column types clash with the store's is *damaged*: the first reader to meet it
moves it into ``quarantine/`` and logs it (``Store.quarantine``), so every other
read goes on without it. Its chunk then reads as unfinished (results) or failed
(inputs), never as done with fewer rows; see ``Store.quarantine``.

Every write goes to a temp file whose name starts with "." (pyarrow.dataset and
our own listings skip such names), is fsynced, then renamed over a name that
depends only on (table, batch, chunk). A retried job therefore replaces its
own file instead of adding a copy, and a writer killed half-way leaves only an
ignored dot-file behind.

The root is a local path or a URI that pyarrow.fs understands (file://, s3://,
gs://, ...); every file operation goes through that ``pyarrow.fs.FileSystem``
(``worker/fs.py`` says how each kind of filesystem makes a write atomic).

The package: ``layout`` (paths, schema version, batch ids, the JSON records
and idempotency keys), ``tables`` (``Store``: chunk files, the kept listing of
a table's files, the quarantine), ``inputs`` (Isotherms to Arrow and back),
``records`` (the manifest and chunk status as types), ``rankings`` and
``reliability`` (rankings across batches and which figures
the data supports), ``readmodel`` (Flask-free reads for the API and the pages;
imported on its own, as it loads the model catalogue).
"""
from .inputs import INPUT_SCHEMA, isotherms_to_table, table_to_isotherms
from .layout import (BATCH_ID_PATTERN, SCHEMA_VERSION, SCHEMA_VERSION_KEY, TABLES,
                     VERSION_1_ID_COLUMN, VERSION_1_TABLE, DamagedFile, StoreError,
                     atomic_write, is_batch_id, iso_utc, nan_to_none, new_batch_id,
                     original_json, utc_now, version_1_error)
from .records import ChunkEntry, ChunkStatus, Manifest
from .rankings import (DEFAULT_RANKING_SORT, LATEST_WINS_RULE, Ranking, RankingQuery, ranking,
                       rankings, sortable_columns)
from .reliability import (CONDITION_COLUMNS, CONDITIONS_OF_SORT, Q_SAT_MAX_RELATIVE_STDERR,
                          RELIABILITY_OF_SORT, condition_sets, conditions_of_sort, reliable_rows,
                          rows_with_flag, with_ranking_columns)
from .tables import CORE_COLUMN_TYPES, QUARANTINE_DIR, Store, TableSnapshot

__all__ = [
    "BATCH_ID_PATTERN", "SCHEMA_VERSION", "SCHEMA_VERSION_KEY", "Store", "StoreError",
    "VERSION_1_ID_COLUMN", "VERSION_1_TABLE", "version_1_error",
    "atomic_write", "is_batch_id", "isotherms_to_table", "iso_utc", "nan_to_none",
    "new_batch_id", "table_to_isotherms", "utc_now", "RankingQuery", "rankings",
    "LATEST_WINS_RULE", "DEFAULT_RANKING_SORT", "Q_SAT_MAX_RELATIVE_STDERR", "Ranking", "ranking",
    "CONDITION_COLUMNS", "RELIABILITY_OF_SORT", "conditions_of_sort", "condition_sets",
    "reliable_rows", "rows_with_flag", "with_ranking_columns",
    "TABLES", "DamagedFile", "INPUT_SCHEMA", "original_json", "CORE_COLUMN_TYPES",
    "QUARANTINE_DIR", "CONDITIONS_OF_SORT", "sortable_columns", "TableSnapshot",
    "ChunkEntry", "ChunkStatus", "Manifest",
]
