"""``sorbrank migrate-store``: bring a store written by an older sorbrank to
the current schema version (``sorbrank.worker.store_migration``)."""
from __future__ import annotations

import argparse
import sys

HELP = "rewrite a store written by an older sorbrank to the current schema version"
DESCRIPTION = """\
Rewrite the store under --data-dir (default: SORBRANK_DATA_DIR, else ./data)
to the schema version this sorbrank reads (3: one declared schema per table,
docs/schema.md). From version 2: every Parquet file is conformed to its
table's schema (flags becomes quality_flags, the per-pressure loading_at_*
columns become the list columns reference_pressures_pa and
reference_loadings_*, typed nulls, every catalogue parameter in fits). From
version 1 also: the column material_id becomes sorbent_id, the per-sorbent
table moves from materials/ to sorbents/, and batch manifests use the new
names. schema_version.json is written last.

Each file is replaced atomically, so a run that is stopped half-way is
completed by running the command again; on a store that is already current it
changes nothing. Files of an unknown version stop the command before anything
is written (exit status 2). Stop the API and the workers first: the command
does not lock the store."""
EPILOG = """\
example:
  sorbrank migrate-store --data-dir /srv/sorbrank"""


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "migrate-store", help=HELP, description=DESCRIPTION, epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--data-dir", default=None,
                        help="store root: a path or a URI pyarrow.fs understands "
                             "(default: SORBRANK_DATA_DIR, else ./data)")
    parser.set_defaults(func=run)


def run(args) -> int:
    from pyarrow.fs import FileType

    from sorbrank.worker.settings import ConfigError, load_shared
    from sorbrank.worker.store import Store, StoreError
    from sorbrank.worker.store_migration import migrate_store

    root = args.data_dir
    if root is None:
        try:
            root = load_shared().data_dir
        except ConfigError as exc:
            print(f"sorbrank migrate-store: {exc}", file=sys.stderr)
            return 2
    try:
        store = Store(root)
        if store.fs.get_file_info(store.base).type != FileType.Directory:
            print(f"sorbrank migrate-store: no store at {root}", file=sys.stderr)
            return 2
        report = migrate_store(store)
    except (StoreError, OSError) as exc:
        print(f"sorbrank migrate-store: {exc}", file=sys.stderr)
        return 2
    for line in report.lines():
        print(line)
    return 0
