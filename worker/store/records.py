"""The JSON records of a batch as typed values: its manifest (written once, at
acceptance) and the status of each chunk.

``to_dict`` gives exactly the JSON the store has always written, and
``from_dict`` reads every manifest and status written so far: keys this code
does not know are kept in ``extra`` and written back unchanged.
"""
from __future__ import annotations

from dataclasses import dataclass, field, fields

QUEUED, RUNNING, DONE, FAILED = "queued", "running", "done", "failed"
SETTLED = (DONE, FAILED)


def _split(data: dict, cls) -> tuple[dict, dict]:
    """(the values of ``cls``'s fields, the other keys) of a JSON record."""
    names = {f.name for f in fields(cls)} - {"extra"}
    return ({k: v for k, v in data.items() if k in names},
            {k: v for k, v in data.items() if k not in names})


@dataclass
class ChunkEntry:
    """One chunk as the manifest lists it."""

    index: int
    isotherms: int                     # how many isotherms the chunk holds
    sorbents: list[str] = field(default_factory=list)
    extra: dict = field(default_factory=dict)

    @classmethod
    def from_dict(cls, data: dict) -> "ChunkEntry":
        known, extra = _split(data, cls)
        return cls(**known, extra=extra)

    def to_dict(self) -> dict:
        return {**self.extra, "index": self.index, "isotherms": self.isotherms,
                "sorbents": self.sorbents}


@dataclass
class Manifest:
    """What a batch is: written once, when it is accepted; its presence is
    what makes the batch exist."""

    batch_id: str
    label: str | None
    accepted_at: str                   # ISO 8601 UTC, fixed width
    options: dict                      # the FitOptions the chunks run with
    conditions: dict                   # Conditions as a dict
    mixtures: list[dict]               # MixtureRequest as dicts
    chunks: list[ChunkEntry]
    accepted: int                      # isotherms accepted
    rejected: list[dict]               # the intake's issues
    rejected_isotherms: int
    source: dict = field(default_factory=dict)   # format, bytes, sha256, client
    extra: dict = field(default_factory=dict)

    @classmethod
    def from_dict(cls, data: dict) -> "Manifest":
        known, extra = _split(data, cls)
        known["chunks"] = [ChunkEntry.from_dict(c) for c in known["chunks"]]
        return cls(**known, extra=extra)

    def to_dict(self) -> dict:
        out = {**self.extra}
        for f in fields(self):
            if f.name != "extra":
                out[f.name] = getattr(self, f.name)
        out["chunks"] = [c.to_dict() for c in self.chunks]
        return out


@dataclass
class ChunkStatus:
    """A chunk's state on disk (a chunk without a status file is queued).

    As JSON, a field that is None is left out, except the ``started_at`` of
    a failed chunk (null when it failed before it ever started)."""

    state: str = QUEUED
    attempts: int = 0                  # deliveries started, see jobs.MAX_ATTEMPTS
    started_at: str | None = None
    finished_at: str | None = None
    isotherms: int | None = None       # isotherms in the chunk
    done: int | None = None            # isotherms with results
    fit_duration_s: float | None = None
    fitted_by_model: dict[str, int] | None = None
    error: str | None = None
    refit_after_damage: str | None = None   # the quarantined file this refit replaces
    extra: dict = field(default_factory=dict)

    @property
    def settled(self) -> bool:
        return self.state in SETTLED

    @classmethod
    def from_dict(cls, data: dict) -> "ChunkStatus":
        known, extra = _split(data, cls)
        return cls(**known, extra=extra)

    def to_dict(self) -> dict:
        out = {**self.extra}
        for f in fields(self):
            value = getattr(self, f.name)
            if f.name != "extra" and (value is not None or (
                    f.name == "started_at" and self.state == FAILED)):
                out[f.name] = value
        return out
