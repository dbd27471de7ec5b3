"""Complete exports, streamed; and the Link headers of paged answers.

CSV, Parquet and Arrow answers hold every matching row unless the request
gives ``limit``/``offset``. The ranked rows are read once as Arrow
(``RankingStream``); the answer is then encoded and sent part by part, so
it never exists whole in memory:

- Arrow: one IPC stream, a record batch per part, sent as each is written.
- Parquet: a true stream too: ``pyarrow.parquet.ParquetWriter`` writes
  sequentially (row groups, then the footer at the end, no seek back), so
  each part becomes a row group sent as soon as it is written.
- CSV: the header, then each part's lines, by ``formats.csv_chunks`` (the
  one CSV encoding of every export, ``worker/csvcodec.py``).

JSON answers stay paged; ``page_links`` gives RFC 8288 ``Link`` relations
(first, prev, next, last) as root-relative URLs keeping every other query
parameter. Any answer holding fewer rows than match carries them, with
``X-Total-Count`` (rows that match) and ``X-Returned-Count`` (rows in this
answer): a cut is never silent.
"""
from __future__ import annotations

import logging
from typing import Iterator
from urllib.parse import urlencode

import pyarrow as pa
import pyarrow.parquet as pq
from flask import Response, request, stream_with_context

from . import formats
from .formats import MEDIA_TYPES

log = logging.getLogger(__name__)
EXTENSIONS = {"csv": "csv", "parquet": "parquet", "arrow": "arrows"}
# rows encoded at a time: CSV text is one Python string per cell while it is
# built (a 50,000-row rankings export peaked at 135 MiB of Python objects with
# 10,000-row parts, 27 MiB with 2,000); Arrow and Parquet stay columnar
PART_ROWS = {"csv": 2_000, "parquet": 10_000, "arrow": 10_000}


class _Sink:
    """A write-only file that keeps what was written until ``drain``: pyarrow
    writers write into it, the response sends what they wrote so far."""

    def __init__(self):
        self.chunks: list[bytes] = []
        self.position = 0
        self.closed = False

    def write(self, data) -> int:
        data = bytes(data)
        self.chunks.append(data)
        self.position += len(data)
        return len(data)

    def tell(self) -> int:
        return self.position

    def flush(self) -> None:
        pass

    def close(self) -> None:
        self.closed = True

    def drain(self) -> bytes:
        out, self.chunks = b"".join(self.chunks), []
        return out


def arrow_chunks(schema: pa.Schema, parts: Iterator[pa.Table]) -> Iterator[bytes]:
    sink = _Sink()
    with pa.ipc.new_stream(sink, schema) as writer:
        for part in parts:
            writer.write_table(part)
            yield sink.drain()
    yield sink.drain()


def parquet_chunks(schema: pa.Schema, parts: Iterator[pa.Table]) -> Iterator[bytes]:
    sink = _Sink()
    with pq.ParquetWriter(sink, schema) as writer:
        for part in parts:
            if part.num_rows:  # an empty row group helps no reader
                writer.write_table(part)
            yield sink.drain()
    yield sink.drain()


def csv_chunks(schema: pa.Schema, parts: Iterator[pa.Table]) -> Iterator[bytes]:
    for text in formats.csv_chunks(schema.names, parts):
        yield text.encode()


WRITERS = {"csv": csv_chunks, "parquet": parquet_chunks, "arrow": arrow_chunks}


def streamed_table(schema: pa.Schema, parts: Iterator[pa.Table], fmt: str, name: str,
                   headers: dict | None = None) -> Response:
    """A CSV, Parquet or Arrow answer written as ``parts`` are read."""
    def body() -> Iterator[bytes]:
        try:
            for chunk in WRITERS[fmt](schema, parts):
                if chunk:
                    yield chunk
        except Exception:
            # the status is sent already: the log says why, the connection closes
            # before the end so the reader sees an incomplete answer, not a short one
            log.exception("%s export %s failed while streaming", fmt, name)
            raise

    resp = Response(stream_with_context(body()), mimetype=MEDIA_TYPES[fmt])
    resp.headers["Content-Disposition"] = f'attachment; filename="{name}.{EXTENSIONS[fmt]}"'
    resp.headers.update(headers or {})
    return resp


def _url(**changes) -> str:
    """This request's root-relative URL with ``changes`` to its query (None
    removes a parameter); the other parameters keep their order and repeats."""
    kept = [(k, v) for k, v in request.args.items(multi=True) if k not in changes]
    kept += [(k, str(v)) for k, v in changes.items() if v is not None]
    return request.path + ("?" + urlencode(kept) if kept else "")


def page_links(total: int, offset: int, limit: int | None) -> dict[str, str]:
    """rel -> URL of the pages around this one; empty when the answer holds
    every matching row. ``limit`` None: every row from ``offset`` on."""
    returned = max(min(total - offset, total if limit is None else limit), 0)
    if returned == total:
        return {}
    if not limit:  # every row from offset on (or a count only): the rest starts at 0
        return {"first": _url(offset=0)}
    links = {"first": _url(offset=0)}
    if offset > 0:
        links["prev"] = _url(offset=max(min(offset, total) - limit, 0))
    if offset + limit < total:
        links["next"] = _url(offset=offset + limit)
    links["last"] = _url(offset=max((total - 1) // limit * limit, 0))
    return links


def paging_headers(total: int, offset: int, limit: int | None) -> dict[str, str]:
    """X-Total-Count, X-Returned-Count and (when rows are left out) Link."""
    returned = max(min(total - offset, total if limit is None else limit), 0)
    headers = {"X-Total-Count": str(total), "X-Returned-Count": str(returned)}
    links = page_links(total, offset, limit)
    if links:
        headers["Link"] = ", ".join(f'<{url}>; rel="{rel}"' for rel, url in links.items())
    return headers
