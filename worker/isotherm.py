"""Core data types shared by intake, engine, metrics, store and service.

Every number held here is in canonical units: pressure Pa, temperature K,
loading mol/kg. The untouched input values travel alongside in ``original``
so that any stored result can be audited against what the rig sent.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np


# Isotherms per unit of work of a batch: a chunk of `sorbrank fit`'s process
# pool and a job of the service (SORBRANK_CHUNK_SIZE). The engine's fixed costs per model
# (seeding, each model's last few rows iterating alone) are shared by the
# chunk, so small chunks are slow: one process fitted the scale benchmark's
# mix at 383 isotherms/s in chunks of 500, 626/s in chunks of 2,000, 762/s in
# chunks of 5,000 (benchmarks/bench_scale.py --n 10000 --workers 1 --chunk N);
# 2,000 keeps a job to a few seconds and a 10,000-isotherm batch spread over
# several workers.
DEFAULT_CHUNK_SIZE = 2000


@dataclass(frozen=True)
class Issue:
    """One validation problem, located as precisely as the input allows.

    ``row`` is the 1-based data row of a CSV/Parquet file (header excluded),
    or the 0-based index of a point inside a JSON isotherm's arrays; ``None``
    when the problem concerns the whole isotherm or batch.
    """

    batch: str
    isotherm: str | None
    row: int | None
    field: str | None
    code: str
    message: str

    def as_dict(self) -> dict[str, Any]:
        return {
            "batch": self.batch,
            "isotherm": self.isotherm,
            "row": self.row,
            "field": self.field,
            "code": self.code,
            "message": self.message,
        }

    def __str__(self) -> str:
        if self.message.startswith("batch "):
            return self.message  # intake messages already carry their location
        where = [f"batch {self.batch!r}"]
        if self.isotherm is not None:
            where.append(f"isotherm {self.isotherm!r}")
        if self.row is not None:
            where.append(f"row {self.row}")
        if self.field is not None:
            where.append(f"field {self.field!r}")
        return f"{', '.join(where)}: {self.message}"


class IntakeError(ValueError):
    """The only exception intake raises: the input as a whole cannot be read.

    Problems confined to one isotherm never raise; they land in
    ``Batch.rejected`` so the good isotherms of the batch still proceed.
    """

    def __init__(self, issues: list[Issue] | Issue):
        self.issues = [issues] if isinstance(issues, Issue) else list(issues)
        super().__init__("; ".join(str(i) for i in self.issues))


@dataclass
class Isotherm:
    """One validated, unit-normalised isotherm, points sorted by pressure."""

    isotherm_id: str
    sorbent_id: str
    adsorbate: str
    temperature_k: float
    pressure_pa: np.ndarray
    loading_mol_per_kg: np.ndarray
    branch: str = "adsorption"
    saturation_pressure_pa: float | None = None
    sigma_mol_per_kg: np.ndarray | None = None
    surface_area_m2_per_g: float | None = None
    batch_label: str = ""
    flags: list[str] = field(default_factory=list)
    # Untouched input for audit: values as sent, their units, and source rows.
    original: dict[str, Any] = field(default_factory=dict)

    @property
    def n_points(self) -> int:
        return int(self.pressure_pa.shape[0])

    @property
    def relative_pressure(self) -> np.ndarray | None:
        if self.saturation_pressure_pa is None:
            return None
        return self.pressure_pa / self.saturation_pressure_pa


@dataclass
class MixtureRequest:
    """A binary (or larger) mixture for which IAST should be evaluated."""

    sorbent_id: str | None  # None = every sorbent with all components
    components: list[str]
    mole_fractions: list[float]
    total_pressure_pa: float
    temperature_k: float


@dataclass
class Conditions:
    """Process conditions for loadings and working capacity (canonical units)."""

    adsorption_pressure_pa: float = 100_000.0
    desorption_pressure_pa: float = 10_000.0
    reference_pressures_pa: tuple[float, ...] = (10_000.0, 100_000.0)
    # temperature swing: adsorb at the lower temperature, desorb at the higher
    adsorption_temperature_k: float | None = None
    desorption_temperature_k: float | None = None


@dataclass
class Batch:
    """What intake hands on: accepted isotherms, rejected ones with reasons."""

    label: str
    isotherms: list[Isotherm] = field(default_factory=list)
    rejected: list[Issue] = field(default_factory=list)
    conditions: Conditions = field(default_factory=Conditions)
    mixtures: list[MixtureRequest] = field(default_factory=list)

    @classmethod
    def combined(cls, batches: list["Batch"], label: str | None = None) -> "Batch":
        """One batch of several inputs (files of one ``sorbrank fit`` run, a list given to
        ``sorbrank.fit``): isotherms, rejections and mixtures of all, the first one's
        conditions, labels joined with "+" unless ``label`` is given."""
        if len(batches) == 1 and label is None:
            return batches[0]
        return cls(label=label or "+".join(b.label for b in batches),
                   isotherms=[iso for b in batches for iso in b.isotherms],
                   rejected=[issue for b in batches for issue in b.rejected],
                   conditions=batches[0].conditions,
                   mixtures=[m for b in batches for m in b.mixtures])

    @property
    def rejected_isotherms(self) -> list[str | None]:
        return sorted({i.isotherm for i in self.rejected}, key=lambda s: (s is None, s or ""))
