"""Job bodies shared by the Celery tasks and the embedded executor.

A batch's state lives on disk, never in the queue: the manifest (written once at
acceptance), one status file per chunk and the chunk result files. Any job here
may run twice or be interrupted at any point; running it again converges on the
same files. A lost broker therefore loses nothing: ``reconcile`` re-enqueues
whatever the disk says is unfinished.
"""
from __future__ import annotations

import logging
import time
from dataclasses import asdict, replace
from datetime import datetime
from typing import Callable

import pyarrow as pa
import pyarrow.compute as pc

from . import fs
from .isotherm import DEFAULT_CHUNK_SIZE, Batch, Conditions, Isotherm, MixtureRequest
from .pipeline import FitOptions, process_batch
from .store import index as read_index
from .store import DamagedFile, Store, isotherms_to_table, iso_utc, new_batch_id, table_to_isotherms, utc_now
from .store.records import DONE, FAILED, RUNNING, SETTLED, ChunkEntry, ChunkStatus, Manifest

log = logging.getLogger(__name__)

# Deliveries of one chunk before it is marked failed. Counts crashes and hard
# time-limit kills too, which Celery's own retry counter never sees.
MAX_ATTEMPTS = 4


class UnknownBatch(LookupError):
    pass


class AttemptsExhausted(RuntimeError):
    pass


class StoreFull(OSError):
    """The store ran out of space (or quota) while a chunk was written: the chunk
    is left unsettled, its attempt not counted, to run again once space returns."""


def plan_chunks(sorbent_ids: list[str], chunk_size: int) -> list[list[int]]:
    """Isotherm positions per chunk; every isotherm of a sorbent in one chunk.

    Per-sorbent metrics (isosteric heat across temperatures, IAST across
    gases) need all of a sorbent's isotherms together, so a sorbent larger
    than ``chunk_size`` gets a chunk of its own rather than being split.
    """
    if chunk_size < 1:
        raise ValueError("chunk size must be at least 1")
    by_sorbent: dict[str, list[int]] = {}
    for position, sorbent in enumerate(sorbent_ids):
        by_sorbent.setdefault(sorbent, []).append(position)
    chunks: list[list[int]] = []
    current: list[int] = []
    for positions in by_sorbent.values():
        if current and len(current) + len(positions) > chunk_size:
            chunks.append(current)
            current = []
        current.extend(positions)
    if current:
        chunks.append(current)
    return chunks


def accept_batch(store: Store, batch: Batch, *, options: dict, chunk_size: int = DEFAULT_CHUNK_SIZE,
                 batch_id: str | None = None, source: dict | None = None) -> dict:
    """Write the batch's normalised inputs durably and return its manifest.

    The manifest is written last: its presence is what makes a batch exist, so
    a crash half-way leaves only unreferenced input files that a retry with the
    same ``batch_id`` overwrites.
    """
    FitOptions(**options)  # refuse options the pipeline would refuse, before writing
    accepted_at = utc_now()
    batch_id = batch_id or new_batch_id(accepted_at)
    chunks = plan_chunks([iso.sorbent_id for iso in batch.isotherms], chunk_size)
    chunk_entries, written = [], []
    for index, positions in enumerate(chunks):
        isotherms = [batch.isotherms[p] for p in positions]
        written.append(("inputs", index, isotherms_to_table(isotherms)))
        store.write_table("inputs", batch_id, index, written[-1][2])
        chunk_entries.append(ChunkEntry(index, len(isotherms),
                                        sorted({iso.sorbent_id for iso in isotherms})))
    manifest = Manifest(
        batch_id=batch_id,
        label=batch.label,
        accepted_at=iso_utc(accepted_at),
        options=dict(options),
        conditions=asdict(batch.conditions),
        mixtures=[asdict(m) for m in batch.mixtures],
        chunks=chunk_entries,
        accepted=len(batch.isotherms),
        rejected=[issue.as_dict() for issue in batch.rejected],
        rejected_isotherms=len([i for i in batch.rejected_isotherms if i is not None]),
        source=source or {},
    ).to_dict()
    store.write_manifest(manifest)
    read_index.record_files(store, batch_id, "accepted", written)
    return manifest


def _manifest(store: Store, batch_id: str) -> Manifest:
    manifest = store.read_manifest(batch_id)
    if manifest is None:
        raise UnknownBatch(f"batch {batch_id!r} is not in the store")
    return Manifest.from_dict(manifest)


def _statuses(store: Store, batch_id: str) -> dict[int, ChunkStatus]:
    return {index: ChunkStatus.from_dict(status)
            for index, status in store.read_chunk_statuses(batch_id).items()}


def _batch_from_manifest(manifest: Manifest, isotherms: list[Isotherm]) -> Batch:
    conditions = dict(manifest.conditions)
    conditions["reference_pressures_pa"] = tuple(conditions["reference_pressures_pa"])
    # accept_batch always writes the batch's label; a null one comes only from a
    # hand-edited manifest, and the batch id names the batch just as well
    label = manifest.label if manifest.label is not None else manifest.batch_id
    return Batch(label=label, isotherms=isotherms,
                 conditions=Conditions(**conditions),
                 mixtures=[MixtureRequest(**m) for m in manifest.mixtures])


def _with_accepted_at(table: pa.Table, accepted_at: str) -> pa.Table:
    # carried on every row so rankings can apply latest-wins without manifests
    moment = datetime.fromisoformat(accepted_at.replace("Z", "+00:00"))
    column = pa.array([moment] * table.num_rows, pa.timestamp("us", tz="UTC"))
    if "accepted_at" in table.column_names:
        table = table.drop_columns(["accepted_at"])
    return table.append_column("accepted_at", column)


def run_chunk(store: Store, batch_id: str, chunk_index: int, *, force: bool = False,
              max_attempts: int = MAX_ATTEMPTS) -> dict:
    """Fit one chunk and write its fits, sorbent rows and summaries.

    Summaries are written after fits and sorbent rows, and the "done" status
    after all three, so a chunk counted as done always has all its files.
    """
    manifest = _manifest(store, batch_id)
    if not 0 <= chunk_index < len(manifest.chunks):
        raise UnknownBatch(f"batch {batch_id!r} has no chunk {chunk_index}")
    previous = _statuses(store, batch_id).get(chunk_index)
    if previous is not None and previous.settled and not force:
        return previous.to_dict()  # a duplicate delivery: the work is already on disk
    attempts = (previous.attempts if previous is not None else 0) + 1
    if attempts > max_attempts:
        raise AttemptsExhausted(f"chunk {chunk_index} of batch {batch_id!r} was started "
                                f"{attempts - 1} times without finishing")
    started_at = iso_utc(utc_now())
    fields = {"batch_id": batch_id, "chunk": chunk_index,
              "isotherm_count": manifest.chunks[chunk_index].isotherms, "attempt": attempts}
    started_s = time.monotonic()
    try:
        store.write_chunk_status(batch_id, chunk_index, ChunkStatus(
            RUNNING, attempts=attempts, started_at=started_at).to_dict())
        log.info("chunk started", extra=fields)
        status = _fit_and_write(store, manifest, batch_id, chunk_index)
    except Exception as exc:
        if fs.out_of_space(exc):
            _give_back_attempt(store, batch_id, chunk_index, previous)
            log.warning("chunk waits: store full (%s); it runs again once space is freed", exc,
                        extra={**fields, "outcome": "store_full"})
            raise StoreFull(f"chunk {chunk_index} of batch {batch_id!r}: store full: {exc}") from exc
        log.warning("chunk stopped by %s: %s", type(exc).__name__, exc, extra={
            **fields, "duration_s": round(time.monotonic() - started_s, 3), "outcome": "error"})
        raise
    status = replace(status, attempts=attempts, started_at=started_at,
                     finished_at=iso_utc(utc_now()))
    store.write_chunk_status(batch_id, chunk_index, status.to_dict())
    log.info("chunk finished", extra={**fields, "duration_s": status.fit_duration_s,
                                      "outcome": "done"})
    return status.to_dict()


def _give_back_attempt(store: Store, batch_id: str, chunk_index: int,
                       previous: ChunkStatus | None) -> None:
    # A full disk is not the chunk's fault: its attempt must not count towards
    # MAX_ATTEMPTS. Rewriting the earlier status may itself fail for want of
    # space; deleting it always works (the chunk then reads as queued).
    try:
        if previous is not None:
            store.write_chunk_status(batch_id, chunk_index, previous.to_dict())
        else:
            store.remove_chunk_status(batch_id, chunk_index)
    except OSError:
        store.remove_chunk_status(batch_id, chunk_index)


def sorbent_rows_table(rows: list[dict]) -> pa.Table:
    """Sorbent rows of every kind as one table: the union of their keys.

    Rows of different kinds (isosteric heat, IAST, temperature swing) carry
    different fields, and pyarrow infers a table's columns from the first row
    alone, which would silently drop the other kinds' fields.
    """
    keys = list(dict.fromkeys(k for row in rows for k in row))
    return pa.Table.from_pylist([{k: row.get(k) for k in keys} for row in rows])


def _fit_and_write(store: Store, manifest: Manifest, batch_id: str, chunk_index: int
                   ) -> ChunkStatus:
    """Fit one chunk, write its three tables; the "done" status to record (not yet written)."""
    started_s = time.monotonic()
    isotherms = table_to_isotherms(store.read_chunk("inputs", batch_id, chunk_index))
    result = process_batch(_batch_from_manifest(manifest, isotherms), FitOptions(**manifest.options))
    accepted_at = manifest.accepted_at
    fits = result.fits_table()
    written = [("fits", chunk_index, _with_accepted_at(fits, accepted_at))]
    store.write_table("fits", batch_id, chunk_index, written[-1][2])
    if result.sorbent_rows:
        sorbents = sorbent_rows_table(result.sorbent_rows)
        written.append(("sorbents", chunk_index, _with_accepted_at(sorbents, accepted_at)))
        store.write_table("sorbents", batch_id, chunk_index, written[-1][2])
    summaries = _with_accepted_at(result.summary_table(), accepted_at)
    store.write_table("summaries", batch_id, chunk_index, summaries)
    written.append(("summaries", chunk_index, summaries))
    # before the "done" status: every done chunk has its read-index entry
    read_index.record_files(store, batch_id, f"chunk-{chunk_index:05d}", written)

    # operational figures, read back by the metrics endpoint: isotherms each
    # model was fitted to (where it applies), and the chunk's wall time
    fitted = fits.filter(fits["applicable"])
    fitted_by_model = {row["values"]: row["counts"]
                       for row in pc.value_counts(fitted["model"]).to_pylist()}
    return ChunkStatus(DONE, isotherms=len(isotherms), done=summaries.num_rows,
                       fit_duration_s=round(time.monotonic() - started_s, 3),
                       fitted_by_model=fitted_by_model)


def record_chunk_failure(store: Store, batch_id: str, chunk_index: int, error: str) -> None:
    """Settle a chunk as failed, keeping the batch's other chunks going."""
    previous = _statuses(store, batch_id).get(chunk_index) or ChunkStatus()
    if previous.state == DONE:
        return  # a late failure report must not undo finished work
    isotherms = _manifest(store, batch_id).chunks[chunk_index].isotherms
    store.write_chunk_status(batch_id, chunk_index, ChunkStatus(
        FAILED, attempts=previous.attempts, started_at=previous.started_at,
        finished_at=iso_utc(utc_now()), isotherms=isotherms, done=0, error=error).to_dict())
    log.error("chunk failed: %s", error, extra={
        "batch_id": batch_id, "chunk": chunk_index, "outcome": "failed",
        "isotherm_count": isotherms})


def execute_chunk(store: Store, batch_id: str, chunk_index: int, *,
                  attempts: int = 2) -> dict | None:
    """Run a chunk with a bounded number of tries, then settle and finalize.

    The embedded executor's whole task; the Celery task does the same with
    Celery's retry machinery instead of this loop. None when the store is full:
    the chunk is left unsettled, for the executor to queue again.
    """
    error = None
    for _ in range(max(attempts, 1)):
        try:
            run_chunk(store, batch_id, chunk_index)
            error = None
            break
        except UnknownBatch:
            raise
        except StoreFull:
            return None  # unsettled on disk: the executor's watch queues it again
        except Exception as exc:  # any failure is recorded, never lost
            log.exception("chunk %s of batch %s failed", chunk_index, batch_id)
            error = f"{type(exc).__name__}: {exc}"
            if isinstance(exc, (AttemptsExhausted, DamagedFile)):
                break  # running it again cannot help
    try:
        if error is not None:
            record_chunk_failure(store, batch_id, chunk_index, error)
        finalize_batch(store, batch_id)
    except OSError as exc:
        if not fs.out_of_space(exc):
            raise
        # the chunk stays unsettled (or its batch unfinalized): reconcile completes it
        log.warning("chunk %s of batch %s: store full while settling it; it is settled once "
                    "space is freed", chunk_index, batch_id)
        return None
    return batch_status(store, batch_id)


def finalize_batch(store: Store, batch_id: str) -> dict | None:
    """Write final.json once every chunk is settled; None while some are not."""
    status = batch_status(store, batch_id)
    if status is None or status["state"] not in ("done", "failed", "partial"):
        return None
    final = {"state": status["state"], "finished_at": status["timings"]["finished_at"],
             "counts": status["counts"]}
    if store.read_final(batch_id) != final:
        store.write_final(batch_id, final)
        # the batch's key rows and /metrics figures in one index file; merged
        # with the other seals once there are enough of them
        read_index.seal_batch(store, batch_id)
        read_index.consolidate_quietly(store)
        accepted_at, finished_at = status["timings"]["accepted_at"], final["finished_at"]
        duration_s = None if not finished_at else round(
            (_parse_utc(finished_at) - _parse_utc(accepted_at)).total_seconds(), 3)
        log.info("batch finished: %s", final["state"], extra={
            "batch_id": batch_id, "outcome": final["state"], "duration_s": duration_s,
            "isotherm_count": status["counts"]["accepted"]})
    return final


def _parse_utc(text: str) -> datetime:
    return datetime.fromisoformat(text.replace("Z", "+00:00"))


def batch_status(store: Store, batch_id: str) -> dict | None:
    """The batch as the disk describes it (the body of GET /batches/{id})."""
    raw = store.read_manifest(batch_id)
    if raw is None:
        return None
    manifest = Manifest.from_dict(raw)
    statuses = _statuses(store, batch_id)
    chunks = manifest.chunks
    chunk_status = [statuses.get(c.index) or ChunkStatus() for c in chunks]
    states = [s.state for s in chunk_status]
    settled = [(c, s) for c, s in zip(chunks, chunk_status) if s.settled]
    done = sum(s.done or 0 for _, s in settled)
    settled_isotherms = sum(c.isotherms for c, _ in settled)

    if len(settled) < len(chunks):
        state = "running" if any(s != "queued" for s in states) else "queued"
    elif all(s == DONE for s in states):
        state = DONE
    elif all(s == FAILED for s in states):
        state = FAILED
    else:
        state = "partial"

    started = [s.started_at for s in statuses.values() if s.started_at]
    finished = [s.finished_at for _, s in settled if s.finished_at]
    is_final = state in (DONE, FAILED, "partial")
    accepted = manifest.accepted
    return {
        "batch_id": batch_id,
        "label": manifest.label,
        "state": state,
        "counts": {
            "accepted": accepted,
            "done": done,
            "failed": settled_isotherms - done,
            "rejected": manifest.rejected_isotherms,
        },
        "progress": round(settled_isotherms / accepted, 4) if accepted else 1.0,
        "chunks": {"total": len(chunks), **{k: states.count(k) for k in
                                            ("queued", "running", "done", "failed")}},
        "timings": {
            "accepted_at": manifest.accepted_at,
            "started_at": min(started) if started else None,
            "finished_at": max(finished) if is_final and finished else None,
        },
        "options": manifest.options,
        "rejected": manifest.rejected,
        "errors": [{"chunk": c.index, "isotherms": c.isotherms, "message": s.error or ""}
                   for c, s in zip(chunks, chunk_status) if s.state == FAILED],
        "damaged_chunks": _damaged_chunks(store, batch_id, statuses),
    }


def _damaged_chunks(store: Store, batch_id: str,
                    statuses: dict[int, ChunkStatus]) -> list[dict]:
    """The batch's quarantined files; ``repaired`` once their chunk was fitted
    again and is done (a damaged inputs file never is)."""
    out = []
    for record in store.damaged_files(batch_id):
        status = statuses.get(record["chunk"]) or ChunkStatus()
        repaired = (record["table"] != "inputs" and status.state == DONE
                    and (status.finished_at or "") > record["quarantined_at"])
        out.append({"chunk": record["chunk"], "table": record["table"],
                    "reason": record["reason"], "quarantined_at": record["quarantined_at"],
                    "file": record["file"], "repaired": repaired})
    return out


def pending_chunks(store: Store, batch_id: str) -> list[int]:
    manifest = _manifest(store, batch_id)
    statuses = _statuses(store, batch_id)
    return [c.index for c in manifest.chunks
            if not (statuses.get(c.index) or ChunkStatus()).settled]


def unsettled_chunks(store: Store) -> dict[tuple[str, int], str]:
    """{(batch id, chunk index): "queued" or "running"} over every unfinished batch."""
    unsettled = {}
    for batch_id in store.batch_ids():
        if store.read_final(batch_id) is not None:
            continue
        statuses = _statuses(store, batch_id)
        for chunk in _manifest(store, batch_id).chunks:
            state = (statuses.get(chunk.index) or ChunkStatus()).state
            if state not in SETTLED:
                unsettled[(batch_id, chunk.index)] = state
    return unsettled


def lost_chunks(unsettled: dict[tuple[str, int], str], held: set[tuple[str, int]],
                suspects: frozenset) -> tuple[list[tuple[str, int]], frozenset]:
    """(chunks to queue again, chunks to check again next round) given the
    store's ``unsettled`` chunks and the chunks a queue ``held``.

    A *running* chunk nobody holds is lost at once. A *queued* one may belong to
    a batch being enqueued this very moment, so it counts as lost only when it
    was already missing at the previous check (``suspects``).
    """
    missing = set(unsettled) - held
    lost = sorted(c for c in missing if unsettled[c] == "running" or c in suspects)
    return lost, frozenset(missing.difference(lost))


def reconcile(store: Store, enqueue: Callable[[str, int], object]) -> list[tuple[str, int]]:
    """Re-enqueue every unsettled chunk of every unfinished batch; finalize the rest."""
    queued = []
    for batch_id in store.batch_ids():
        if store.read_final(batch_id) is not None:
            continue
        pending = pending_chunks(store, batch_id)
        for chunk_index in pending:
            enqueue(batch_id, chunk_index)
            queued.append((batch_id, chunk_index))
        if not pending:
            finalize_batch(store, batch_id)
    if queued:
        log.info("reconcile: re-enqueued %d chunk(s) of unfinished batches", len(queued))
    return queued
