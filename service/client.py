"""A small HTTP client for a running sorbrank service (standard library only).

Used by ``sorbrank submit``, ``sorbrank rank`` and ``sorbrank demo``.
"""
from __future__ import annotations

import json
import os
import sys
import time
import urllib.error
import urllib.parse
import urllib.request
import uuid
from pathlib import Path

DEFAULT_URL = "http://127.0.0.1:8000"
MEDIA_BY_SUFFIX = {".csv": "text/csv", ".json": "application/json",
                   ".parquet": "application/vnd.apache.parquet",
                   ".pq": "application/vnd.apache.parquet"}
FINAL_STATES = ("done", "failed", "partial")
# Statuses worth retrying with the same Idempotency-Key: the server may or may
# not have stored the batch, and the key makes a second try safe either way.
RETRY_STATUSES = (502, 503, 504)


class ApiError(RuntimeError):
    def __init__(self, status: int, problem: dict):
        self.status, self.problem = status, problem
        text = problem.get("detail") or problem.get("title") or "request failed"
        super().__init__(f"HTTP {status}: {text}")


def default_url() -> str:
    return os.environ.get("SORBRANK_URL") or DEFAULT_URL


class Client:
    def __init__(self, url: str | None = None, token: str | None = None, timeout_s: float = 120.0):
        base = (url or default_url()).rstrip("/")
        self.api = base if base.endswith("/api/v1") else base + "/api/v1"
        self.root = self.api[: -len("/api/v1")]
        self.token = token or os.environ.get("SORBRANK_TOKEN") or None
        self.timeout_s = timeout_s

    def _request(self, method: str, url: str, body: bytes | None = None,
                 headers: dict | None = None) -> tuple[int, dict, bytes]:
        headers = dict(headers or {})
        if self.token:
            headers["Authorization"] = f"Bearer {self.token}"
        req = urllib.request.Request(url, data=body, method=method, headers=headers)
        try:
            with urllib.request.urlopen(req, timeout=self.timeout_s) as resp:
                return resp.status, dict(resp.headers), resp.read()
        except urllib.error.HTTPError as err:
            payload = err.read()
            try:
                problem = json.loads(payload)
            except ValueError:
                problem = {"title": err.reason, "detail": payload.decode(errors="replace")[:500]}
            raise ApiError(err.code, problem) from None

    def _get_json(self, path: str, params: dict | None = None) -> dict:
        query = "?" + urllib.parse.urlencode(params, doseq=True) if params else ""
        _, _, data = self._request("GET", self.api + path + query, headers={"Accept": "application/json"})
        return json.loads(data)

    def ready(self) -> bool:
        try:
            self._request("GET", self.root + "/readyz")
            return True
        except (ApiError, OSError):
            return False

    def submit_file(self, path: Path, params: dict | None = None, attempts: int = 3) -> dict:
        """POST one batch file; retried on network errors with one Idempotency-Key."""
        media = MEDIA_BY_SUFFIX.get(path.suffix.lower())
        if media is None:
            raise ValueError(f"{path}: unknown batch file type (use .csv, .json or .parquet)")
        body = path.read_bytes()
        query = "?" + urllib.parse.urlencode({k: v for k, v in (params or {}).items() if v is not None})
        headers = {"Content-Type": media, "Idempotency-Key": str(uuid.uuid4())}
        for attempt in range(1, attempts + 1):
            try:
                _, _, data = self._request("POST", self.api + "/batches" + query.rstrip("?"), body, headers)
                return json.loads(data)
            except ApiError as err:
                if err.status not in RETRY_STATUSES or attempt == attempts:
                    raise
            except OSError:
                if attempt == attempts:
                    raise
            time.sleep(0.5 * 2 ** attempt)
        raise AssertionError("unreachable")

    def batch(self, batch_id: str) -> dict:
        return self._get_json(f"/batches/{urllib.parse.quote(batch_id)}")

    def wait(self, batch_id: str, on_progress=None, timeout_s: float = 3600.0,
             interval_s: float = 0.5) -> dict:
        """Poll until the batch is settled or ``timeout_s`` passes (then TimeoutError)."""
        deadline = time.monotonic() + timeout_s
        for _ in range(int(timeout_s / interval_s) + 1):
            status = self.batch(batch_id)
            if on_progress:
                on_progress(status)
            if status["state"] in FINAL_STATES:
                return status
            if time.monotonic() > deadline:
                break
            time.sleep(interval_s)
        raise TimeoutError(f"batch {batch_id} not finished after {timeout_s:.0f} s")

    def rankings(self, params: dict, fmt: str = "json"):
        params = {k: v for k, v in params.items() if v is not None}
        if fmt == "json":
            return self._get_json("/rankings", params)
        query = urllib.parse.urlencode({**params, "format": fmt}, doseq=True)
        return self._request("GET", f"{self.api}/rankings?{query}")[2]


# -- terminal output ----------------------------------------------------------------

def progress_line(label: str, status: dict, width: int = 30) -> str:
    fraction = float(status.get("progress") or 0.0)
    filled = int(round(fraction * width))
    counts = status.get("counts", {})
    return (f"\r{label[:28]:<28} [{'#' * filled}{'.' * (width - filled)}] {fraction:6.1%} "
            f"{status['state']:<8} {counts.get('done', 0)}/{counts.get('accepted', 0)} isotherms")


def progress_printer(label: str, stream=sys.stderr):
    def show(status: dict) -> None:
        stream.write(progress_line(label, status))
        if status["state"] in FINAL_STATES:
            stream.write("\n")
        stream.flush()
    return show


def _cell(value) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        # 298.15 K must not print as 298.1: keep two decimals for mid-size numbers
        return f"{value:.2f}" if 100 <= abs(value) < 1e5 else f"{value:.4g}"
    if isinstance(value, list):
        return ",".join(map(str, value)) or "-"
    return str(value)


def format_table(rows: list[dict], columns: list[str]) -> str:
    """Rows as a plain aligned text table (4 significant digits; 100..1e5 with two decimals)."""
    cells = [[_cell(r.get(c)) for c in columns] for r in rows]
    widths = [max([len(c)] + [len(row[i]) for row in cells]) for i, c in enumerate(columns)]
    lines = ["  ".join(c.ljust(w) for c, w in zip(columns, widths)),
             "  ".join("-" * w for w in widths)]
    lines += ["  ".join(v.rjust(w) if _numeric(v) else v.ljust(w) for v, w in zip(row, widths))
              for row in cells]
    return "\n".join(lines)


def _numeric(text: str) -> bool:
    try:
        float(text)
        return True
    except ValueError:
        return False


RANK_COLUMNS = ["sorbent_id", "adsorbate", "temperature_k", "best_model", "q_sat_mol_per_kg",
                "henry_mol_per_kg_pa", "bet_area_m2_per_g", "working_capacity_mol_per_kg", "flags"]


def ranked_table(rows: list[dict], sort: str, offset: int = 0) -> str:
    columns = list(RANK_COLUMNS)
    if sort not in columns:
        columns.insert(4, sort)
    numbered = [{"rank": offset + i + 1, **row} for i, row in enumerate(rows)]
    return format_table(numbered, ["rank"] + columns)
