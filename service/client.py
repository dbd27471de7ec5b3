"""The HTTP client of a running sorbrank service (standard library only).

``sorbrank.Client`` is this class: notebooks submit DataFrames and read
results as DataFrames with it, and ``sorbrank submit``, ``sorbrank rank`` and
``sorbrank demo`` use it too. Results travel as Parquet or Arrow, never
JSON, so column types survive. pyarrow and pandas are imported only by the
methods that need them.
"""
from __future__ import annotations

import io
import json
import os
import socket
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
PARQUET_MEDIA = MEDIA_BY_SUFFIX[".parquet"]
FINAL_STATES = ("done", "failed", "partial")
RESULT_TABLES = ("summary", "fits", "sorbents")
# GET /rankings parameters beside adsorbate, temperature_k, sort and limit
RANKING_FILTERS = ("temperature_tolerance_k", "order", "offset", "flag", "exclude_flag",
                   "batch_id", "sorbent_id", "all")
# Statuses worth retrying with the same Idempotency-Key: the server may or may
# not have stored the batch, and the key makes a second try safe either way.
RETRY_STATUSES = (502, 503, 504)


class ApiError(RuntimeError):
    def __init__(self, status: int, problem: dict):
        self.status, self.problem = status, problem
        text = problem.get("detail") or problem.get("title") or "request failed"
        super().__init__(f"HTTP {status}: {text}")


class ServiceUnreachable(ConnectionError):
    """No sorbrank service answered at the address (refused, unknown host, timeout)."""

    def __init__(self, root: str, reason: str):
        self.root, self.reason = root, reason
        super().__init__(f"no sorbrank service answers at {root} ({reason}) — start one with "
                         "`sorbrank serve` or set SORBRANK_URL / --url")


def default_url() -> str:
    return os.environ.get("SORBRANK_URL") or DEFAULT_URL


class Client:
    """A running sorbrank service at ``url`` (default $SORBRANK_URL, else
    http://127.0.0.1:8000), with bearer ``token`` (default $SORBRANK_TOKEN)."""

    def __init__(self, url: str | None = None, token: str | None = None, timeout_s: float = 120.0):
        base = (url or default_url()).rstrip("/")
        self.api = base if base.endswith("/api/v1") else base + "/api/v1"
        self.root = self.api[: -len("/api/v1")]
        self.token = token or os.environ.get("SORBRANK_TOKEN") or None
        self.timeout_s = timeout_s

    def __repr__(self) -> str:
        return f"sorbrank.Client({self.root!r})"

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
        except urllib.error.URLError as err:
            raise ServiceUnreachable(self.root, _reason(err.reason)) from None
        except TimeoutError:
            raise ServiceUnreachable(self.root, f"no answer within {self.timeout_s:g} s") from None
        except ConnectionError as err:  # reset or closed mid-answer
            raise ServiceUnreachable(self.root, _reason(err)) from None

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

    # -- submitting -----------------------------------------------------------
    def submit(self, data, *, units=None, sample_mass_g: float | None = None,
               batch_label: str | None = None, models=None, criterion: str | None = None,
               weighting: str | None = None, attempts: int = 3) -> SubmittedBatch:
        """Send one batch; return its handle once the service has it on disk.

        ``data``: a pandas DataFrame or pyarrow Table (sent as Parquet), a
        path to a .csv, .json or .parquet file, or the bytes of one.
        ``units`` as in ``sorbrank.fit`` (a mapping or "pressure:kPa,...").
        Isotherms with problems are listed in ``.rejected``; the rest are
        fitted. A batch with no acceptable isotherm raises ApiError (422).
        """
        body, media = batch_body(data)
        if isinstance(models, (list, tuple)):
            models = ",".join(models)
        params = {"units": units_text(units), "sample_mass_g": sample_mass_g,
                  "batch_label": batch_label, "models": models, "criterion": criterion,
                  "weighting": weighting}
        return SubmittedBatch(self, self.post_batch(body, media, params, attempts))

    def submit_file(self, path: Path, params: dict | None = None, attempts: int = 3) -> dict:
        """POST one batch file; the service's reply (batch_id, accepted, rejected)."""
        body, media = batch_body(Path(path))
        return self.post_batch(body, media, params, attempts)

    def post_batch(self, body: bytes, media: str, params: dict | None = None,
                   attempts: int = 3) -> dict:
        """POST a batch body; retried on network errors with one Idempotency-Key."""
        query = urllib.parse.urlencode({k: v for k, v in (params or {}).items() if v is not None})
        url = self.api + "/batches" + (f"?{query}" if query else "")
        headers = {"Content-Type": media, "Idempotency-Key": str(uuid.uuid4())}
        for attempt in range(1, attempts + 1):
            try:
                _, _, data = self._request("POST", url, body, headers)
                return json.loads(data)
            except ApiError as err:
                if err.status not in RETRY_STATUSES or attempt == attempts:
                    raise
            except OSError:
                if attempt == attempts:
                    raise
            time.sleep(0.5 * 2 ** attempt)
        raise AssertionError("unreachable")

    # -- batches --------------------------------------------------------------
    def batch(self, batch_id: str) -> dict:
        """The batch's status document (state, progress, counts, rejected, errors)."""
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

    def results_table(self, batch_id: str, table: str = "summary"):
        """A batch's ``summary``, ``fits`` or ``sorbents`` table as a pyarrow Table (via Parquet)."""
        if table not in RESULT_TABLES:
            raise ValueError(f"table must be one of {', '.join(RESULT_TABLES)}; got {table!r}")
        import pyarrow.parquet as pq

        query = urllib.parse.urlencode({"table": table, "format": "parquet"})
        _, _, data = self._request("GET", f"{self.api}/batches/{urllib.parse.quote(batch_id)}"
                                   f"/results?{query}", headers={"Accept": PARQUET_MEDIA})
        return pq.read_table(io.BytesIO(data))

    def batches(self, state: str | None = None) -> list[dict]:
        """Every batch's status summary, newest first (``state``: only those in
        it), following the list's Link rel="next" page after page."""
        return [b for page in self._pages("/batches", {"state": state, "limit": 1000})
                for b in page["batches"]]

    def _pages(self, path: str, params: dict):
        """JSON pages of a list endpoint: the first, then each Link rel="next"."""
        query = {k: v for k, v in params.items() if v is not None}
        url = self.api + path + ("?" + urllib.parse.urlencode(query, doseq=True) if query else "")
        seen = set()
        while url is not None:
            if url in seen:  # a server linking a page to itself would never end
                raise ApiError(502, {"detail": f"pagination loops at {url}"})
            seen.add(url)
            _, headers, data = self._request("GET", url, headers={"Accept": "application/json"})
            yield json.loads(data)
            following = link_relations(header(headers, "Link")).get("next")
            url = urllib.parse.urljoin(self.root + "/", following) if following else None

    # -- rankings -------------------------------------------------------------
    def rankings(self, adsorbate: str | None = None, temperature_k: float | None = None,
                 sort: str = "q_sat_mol_per_kg", limit: int | None = None, **filters):
        """Ranked results across every batch as a pandas DataFrame (latest batch
        wins per sorbent, adsorbate, branch and temperature unless ``all=True``):
        every matching row, or the first ``limit`` (after ``offset``).

        ``adsorbate`` is matched as intake stores it (co2 is CO2); a gas
        name intake does not know raises ApiError (400) naming it.
        ``filters``: temperature_tolerance_k, order ("desc"/"asc"), offset,
        flag, exclude_flag (a name or a list), batch_id, sorbent_id, all.
        """
        from sorbrank.study import pandas_module

        pandas_module()
        return self.rankings_table(adsorbate=adsorbate, temperature_k=temperature_k, sort=sort,
                                   limit=limit, **filters).to_pandas()

    def rankings_table(self, adsorbate: str | None = None, temperature_k: float | None = None,
                       sort: str = "q_sat_mol_per_kg", limit: int | None = None, **filters):
        """``rankings`` as a pyarrow Table: the service's complete Arrow export
        (every matching row in one stream unless ``limit`` is given)."""
        import pyarrow as pa

        unknown = sorted(set(filters) - set(RANKING_FILTERS))
        if unknown:
            raise ValueError(f"unknown ranking filter(s) {', '.join(unknown)}; "
                             f"choose from {', '.join(RANKING_FILTERS)}")
        if "all" in filters:
            filters["all"] = "true" if filters["all"] else None
        params = {"adsorbate": adsorbate, "temperature_k": temperature_k, "sort": sort,
                  "limit": limit, **filters}
        data = self.rankings_bytes(params, "arrow")
        with pa.ipc.open_stream(data) as reader:
            return reader.read_all()

    def rankings_document(self, params: dict) -> dict:
        """GET /rankings as JSON: rows, total, sort, order, deduplication...
        Without a ``limit`` in ``params``, every matching row: the pages are
        followed by their Link rel="next" and their rows joined (``returned``
        counts them); with one, that page only."""
        params = {k: v for k, v in params.items() if v is not None}
        doc = None
        for page in self._pages("/rankings", params):
            if doc is None:
                doc = page
            else:
                doc["rows"].extend(page["rows"])
            if "limit" in params:
                break
        doc["returned"] = len(doc["rows"])
        if "limit" not in params:
            doc["limit"], doc["links"] = None, {}
        return doc

    def rankings_bytes(self, params: dict, fmt: str) -> bytes:
        """GET /rankings in ``fmt`` (csv, parquet, arrow) as the service sent it:
        every matching row unless ``params`` has a ``limit``."""
        query = urllib.parse.urlencode({**{k: v for k, v in params.items() if v is not None},
                                        "format": fmt}, doseq=True)
        return self._request("GET", f"{self.api}/rankings?{query}")[2]


def header(headers: dict, name: str) -> str | None:
    """A response header by its name in any case."""
    return next((v for k, v in headers.items() if k.lower() == name.lower()), None)


def link_relations(value: str | None) -> dict[str, str]:
    """RFC 8288 Link header -> {rel: URL} (each rel of a space-separated list)."""
    found: dict[str, str] = {}
    for part in (value or "").split(","):
        if "<" not in part or ">" not in part:
            continue
        url, _, rest = part.strip().partition(">")
        for param in rest.split(";"):
            key, _, val = param.strip().partition("=")
            if key.strip().lower() == "rel":
                for rel in val.strip().strip('"').split():
                    found.setdefault(rel.lower(), url.strip().lstrip("<"))
    return found


class SubmittedBatch:
    """A batch the service accepted: ``id``, ``accepted`` (isotherms),
    ``rejected`` (intake issues), ``status()``, ``wait()``, ``results()``."""

    def __init__(self, client: Client, reply: dict):
        self.client = client
        self.reply = reply
        self.id: str = reply["batch_id"]
        self.accepted: int = reply["accepted"]
        self.rejected: list[dict] = reply["rejected"]

    def __repr__(self) -> str:
        return (f"<sorbrank batch {self.id}: {self.accepted} isotherm(s) accepted, "
                f"{len(self.rejected)} rejection issue(s)>")

    def status(self) -> dict:
        """The service's status document: state, progress, counts, rejected, errors."""
        return self.client.batch(self.id)

    def wait(self, timeout_s: float = 3600.0, progress: bool = True, interval_s: float = 0.5) -> dict:
        """Block until the batch is done, failed or partial; its final status.

        With ``progress`` a bar on standard error follows the fitted isotherms.
        Raises TimeoutError after ``timeout_s``.
        """
        show = progress_printer(self.id) if progress else None
        return self.client.wait(self.id, show, timeout_s=timeout_s, interval_s=interval_s)

    def results(self, table: str = "summary"):
        """The ``summary``, ``fits`` or ``sorbents`` table as a pandas DataFrame."""
        from sorbrank.study import pandas_module

        pandas_module()
        return self.client.results_table(self.id, table).to_pandas()

    def to_arrow(self, table: str = "summary"):
        """The ``summary``, ``fits`` or ``sorbents`` table as a pyarrow Table."""
        return self.client.results_table(self.id, table)


def batch_body(data) -> tuple[bytes, str]:
    """(body, media type) to POST for ``data``: DataFrame/Table, path or bytes."""
    if isinstance(data, (bytes, bytearray, memoryview)):
        body = bytes(data)
        if body.startswith(b"PAR1"):
            return body, PARQUET_MEDIA
        return body, "application/json" if body.lstrip()[:1] == b"{" else "text/csv"
    if isinstance(data, (str, os.PathLike)):
        path = Path(data)
        media = MEDIA_BY_SUFFIX.get(path.suffix.lower())
        if media is None:
            raise ValueError(f"{path}: unknown batch file type (use .csv, .json or .parquet)")
        return path.read_bytes(), media
    import pyarrow as pa
    import pyarrow.parquet as pq

    from sorbrank.study import dataframe_to_table, is_dataframe

    if is_dataframe(data):
        data = dataframe_to_table(data)
    if not isinstance(data, pa.Table):
        raise TypeError("a batch is a pandas DataFrame, a pyarrow Table, a path or bytes; "
                        f"got {type(data).__name__}")
    sink = io.BytesIO()
    pq.write_table(data, sink)
    return sink.getvalue(), PARQUET_MEDIA


def units_text(units) -> str | None:
    """A units declaration in its text form ("pressure:kPa,loading:mmol/g")."""
    if units is None or isinstance(units, str):
        return units
    if isinstance(units, dict):
        return ",".join(f"{quantity}:{unit}" for quantity, unit in units.items())
    raise ValueError('units must be a mapping like {"pressure": "kPa", "loading": "mmol/g"} '
                     f'or the text "pressure:kPa,loading:mmol/g"; got {type(units).__name__}')


def _reason(reason) -> str:
    """The plain words of a socket error (urllib wraps them in URLError)."""
    if isinstance(reason, socket.gaierror):
        return "unknown host"
    if isinstance(reason, ConnectionRefusedError):
        return "connection refused"
    if isinstance(reason, TimeoutError):
        return "no answer in time"
    if isinstance(reason, OSError) and reason.strerror:
        return reason.strerror.lower()
    return str(reason)


# -- terminal output ----------------------------------------------------------------

def progress_line(label: str, status: dict, width: int = 30) -> str:
    fraction = float(status.get("progress") or 0.0)
    filled = round(fraction * width)
    counts = status.get("counts", {})
    return (f"\r{label[:28]:<28} [{'#' * filled}{'.' * (width - filled)}] {fraction:6.1%} "
            f"{status['state']:<8} {counts.get('done', 0)}/{counts.get('accepted', 0)} isotherms")


def progress_printer(label: str, stream=None):
    """A callback drawing the progress bar on ``stream`` (default: the
    sys.stderr of the moment, which a notebook or a test may have replaced)."""
    def show(status: dict) -> None:
        out = stream or sys.stderr
        out.write(progress_line(label, status))
        if status["state"] in FINAL_STATES:
            out.write("\n")
        out.flush()
    return show


def format_cell(value) -> str:
    """One value as table text: None as '-', lists joined, floats to 4 digits."""
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
    cells = [[format_cell(r.get(c)) for c in columns] for r in rows]
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
                "henry_mol_per_kg_pa", "bet_area_m2_per_g", "working_capacity_mol_per_kg", "quality_flags"]


def ranked_table(rows: list[dict], sort: str, offset: int = 0) -> str:
    columns = list(RANK_COLUMNS)
    if sort not in columns:
        columns.insert(4, sort)
    numbered = [{"rank": offset + i + 1, **row} for i, row in enumerate(rows)]
    return format_table(numbered, ["rank"] + columns)
