"""Prometheus metrics, derived from the durable store plus the live queue length.

Why from the store: a batch is accepted by one of several gunicorn processes
and fitted by Celery processes on other machines. Counters kept in process
memory would each hold a part and reset at every restart; the store holds
everything. So every API process computes the same complete, never
decreasing counters on scrape, and the Celery workers need no HTTP endpoint
of their own. (``sorbrank worker`` serves the same figures on
SORBRANK_WORKER_METRICS_PORT when set, for a worker machine Prometheus can
reach while the API is out of its reach: scrape one source, not both, or
the sums double.)

Cost of a scrape: the read index's refresh (``worker/store/index.py``): a
finished batch's figures were recorded in its seal when it finished, so a
scrape reads only the status files of unfinished batches. Without the index
(SORBRANK_READ_INDEX=0): one listing of ``<root>/batches`` with a manifest
check per batch; a settled batch's figures are read once per process and
kept (a few hundred bytes per batch).

Where the figures come from: each finished chunk's status file records the
isotherms fitted per model and the chunk's wall time (``worker/jobs.py``).
"""
from __future__ import annotations

import logging
import threading
from collections import Counter
from dataclasses import dataclass, field
from typing import Callable, Iterator

from prometheus_client import CONTENT_TYPE_LATEST, CollectorRegistry, generate_latest
from prometheus_client.core import (CounterMetricFamily, GaugeMetricFamily,
                                    HistogramMetricFamily, Metric)

from sorbrank.worker.store import Store
from sorbrank.worker.store.index import read_index

log = logging.getLogger(__name__)

CONTENT_TYPE = CONTENT_TYPE_LATEST
# per chunk (up to SORBRANK_CHUNK_SIZE isotherms): from sub-second to the hard limit
DURATION_BUCKETS_S = (0.5, 1.0, 2.0, 5.0, 10.0, 30.0, 60.0, 120.0, 300.0, 600.0, 1800.0)
FINAL_STATES = ("done", "failed", "partial")


@dataclass(frozen=True)
class BatchFigures:
    state: str | None  # final state; None while some chunk is unsettled
    fitted_by_model: dict[str, int]
    chunk_durations_s: tuple[float, ...]
    size_bytes: int


def batch_figures(store: Store, batch_id: str) -> BatchFigures:
    # final.json first: when it exists, every chunk status read after it is settled
    final = store.read_final(batch_id)
    fitted: Counter = Counter()
    durations = []
    for status in store.read_chunk_statuses(batch_id).values():
        if status.get("state") != "done":
            continue
        fitted.update(status.get("fitted_by_model") or {})
        if status.get("fit_duration_s") is not None:
            durations.append(float(status["fit_duration_s"]))
    return BatchFigures(final.get("state") if final else None, dict(fitted), tuple(durations),
                        store.batch_size_bytes(batch_id))


def _from_record(record: dict) -> BatchFigures:
    return BatchFigures(record["state"], dict(record["fitted_by_model"]),
                        tuple(record["chunk_durations_s"]), int(record["size_bytes"]))


@dataclass
class Totals:
    """Sums of BatchFigures over batches: what a scrape reports."""

    batches: int = 0
    states: Counter = field(default_factory=Counter)
    fitted: Counter = field(default_factory=Counter)
    buckets: list = field(default_factory=lambda: [0] * len(DURATION_BUCKETS_S))
    chunks: int = 0
    duration_sum_s: float = 0.0
    size_bytes: int = 0

    def add(self, b: BatchFigures) -> None:
        self.batches += 1
        if b.state is not None:
            self.states[b.state] += 1
        self.fitted.update(b.fitted_by_model)
        for d in b.chunk_durations_s:
            for i, le in enumerate(DURATION_BUCKETS_S):
                if d <= le:
                    self.buckets[i] += 1
        self.chunks += len(b.chunk_durations_s)
        self.duration_sum_s += sum(b.chunk_durations_s)
        self.size_bytes += b.size_bytes

    def copy(self) -> "Totals":
        return Totals(self.batches, Counter(self.states), Counter(self.fitted),
                      list(self.buckets), self.chunks, self.duration_sum_s, self.size_bytes)


class StoreCollector:
    """A prometheus_client custom collector reading the store on each scrape."""

    def __init__(self, store: Store, queue_depth: Callable[[], int | None] | None = None):
        self.store = store
        self.queue_depth = queue_depth
        self._settled: dict[str, BatchFigures] = {}
        self._finished_totals: tuple[int, Totals] | None = None  # (index version, sums)
        self._lock = threading.Lock()  # one scan at a time per process

    def figures(self) -> list[BatchFigures]:
        with self._lock:
            index = read_index(self.store)
            if index is None:
                ids, finished = self.store.batch_ids(), {}
            else:
                ids, finished = index.batch_ids(), index.finished()
            out = []
            for batch_id in ids:
                record = finished.get(batch_id)
                if record is not None:  # a sealed batch: its figures, kept in the index
                    out.append(_from_record(record))
                    continue
                out.append(self._live(batch_id))
            return out

    def _live(self, batch_id: str) -> BatchFigures:
        figures = self._settled.get(batch_id)
        if figures is None:
            figures = batch_figures(self.store, batch_id)
            if figures.state is not None:
                self._settled[batch_id] = figures
        return figures

    def totals(self) -> "Totals":
        """The sums a scrape reports: those of the finished batches in the read
        index are added up once per change of the index, then the others'."""
        with self._lock:
            index = read_index(self.store)
            if index is None:
                ids, done = self.store.batch_ids(), Totals()
            else:
                ids = index.unfinished_ids()
                if self._finished_totals is None or self._finished_totals[0] != index.version:
                    done = Totals()
                    for record in index.finished().values():
                        done.add(_from_record(record))
                    self._finished_totals = (index.version, done)
                done = self._finished_totals[1]
            totals = done.copy()
            for batch_id in ids:
                totals.add(self._live(batch_id))
            return totals

    def collect(self) -> Iterator[Metric]:
        totals = self.totals()
        yield CounterMetricFamily("sorbrank_batches_accepted", "Batches accepted (on disk)",
                                  value=totals.batches)
        for state in FINAL_STATES:
            yield CounterMetricFamily(f"sorbrank_batches_{state}",
                                      f"Batches finished in state {state!r}",
                                      value=totals.states.get(state, 0))

        per_model = CounterMetricFamily("sorbrank_isotherms_fitted",
                                        "Isotherms each model was fitted to (where it applies)",
                                        labels=["model"])
        for model, count in sorted(totals.fitted.items()):
            per_model.add_metric([model], count)
        yield per_model

        buckets = [(str(le), n) for le, n in zip(DURATION_BUCKETS_S, totals.buckets)]
        yield HistogramMetricFamily("sorbrank_chunk_fit_duration_seconds",
                                    "Wall time of each finished chunk: read, fit, write",
                                    buckets=buckets + [("+Inf", totals.chunks)],
                                    sum_value=totals.duration_sum_s)

        yield GaugeMetricFamily("sorbrank_store_size_bytes",
                                "Bytes of the store's batch files (tables, manifests, statuses)",
                                value=totals.size_bytes)
        yield GaugeMetricFamily("sorbrank_quarantined_files",
                                "Damaged data files moved to the store's quarantine folder",
                                value=self.store.quarantined_count())
        if self.queue_depth is not None:
            depth = self.queue_depth()
            if depth is not None:
                yield GaugeMetricFamily("sorbrank_queue_depth_chunks",
                                        "Chunk jobs waiting to be fitted", value=depth)


def broker_queue_depth(broker_url: str) -> Callable[[], int | None]:
    """Length of the Celery queue in Redis (every priority list); None when unreachable."""
    import redis
    from kombu.transport.redis import PRIORITY_STEPS, Channel

    from sorbrank.worker.celery_app import QUEUE

    client = redis.Redis.from_url(broker_url, socket_timeout=1, socket_connect_timeout=1)
    keys = [QUEUE] + [f"{QUEUE}{Channel.sep}{step}" for step in PRIORITY_STEPS if step]

    def depth() -> int | None:
        try:
            with client.pipeline(transaction=False) as pipe:
                for key in keys:
                    pipe.llen(key)
                return sum(pipe.execute())
        except redis.RedisError as exc:
            log.warning("queue depth unknown: broker unreachable (%s)", exc)
            return None

    return depth


def make_registry(store: Store, queue_depth: Callable[[], int | None] | None) -> CollectorRegistry:
    registry = CollectorRegistry(auto_describe=False)
    registry.register(StoreCollector(store, queue_depth))
    return registry


def exposition(registry: CollectorRegistry) -> bytes:
    return generate_latest(registry)
