"""Pack many isotherms of unequal length into padded arrays for batch work."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .isotherm import Isotherm


@dataclass
class Packed:
    """A batch of isotherms as arrays (n isotherms, m = longest point count).

    Padding repeats each isotherm's last real point and is excluded by
    ``mask``; models therefore never see values they were not built for.
    """

    isotherm_ids: list[str]
    sorbent_ids: list[str]
    adsorbates: list[str]
    branches: list[str]
    temperature_k: np.ndarray            # (n,)
    pressure_pa: np.ndarray              # (n, m)
    loading_mol_per_kg: np.ndarray       # (n, m)
    mask: np.ndarray                     # (n, m) bool
    saturation_pressure_pa: np.ndarray   # (n,) nan where unknown
    sigma_mol_per_kg: np.ndarray | None  # (n, m) or None when no isotherm gave sigma
    surface_area_m2_per_g: np.ndarray    # (n,) nan where not given
    n_points: np.ndarray                 # (n,) int

    @property
    def n(self) -> int:
        return len(self.isotherm_ids)

    @property
    def relative_pressure(self) -> np.ndarray:
        """p/p0, (n, m); nan rows where p0 is unknown."""
        return self.pressure_pa / self.saturation_pressure_pa[:, None]

    def take(self, index: np.ndarray) -> "Packed":
        """Rows ``index`` as a new Packed (used to chunk and to subset)."""
        index = np.asarray(index)
        pick = lambda seq: [seq[i] for i in index]  # noqa: E731
        return Packed(
            isotherm_ids=pick(self.isotherm_ids),
            sorbent_ids=pick(self.sorbent_ids),
            adsorbates=pick(self.adsorbates),
            branches=pick(self.branches),
            temperature_k=self.temperature_k[index],
            pressure_pa=self.pressure_pa[index],
            loading_mol_per_kg=self.loading_mol_per_kg[index],
            mask=self.mask[index],
            saturation_pressure_pa=self.saturation_pressure_pa[index],
            sigma_mol_per_kg=None if self.sigma_mol_per_kg is None else self.sigma_mol_per_kg[index],
            surface_area_m2_per_g=self.surface_area_m2_per_g[index],
            n_points=self.n_points[index],
        )


def pack(isotherms: list[Isotherm]) -> Packed:
    """Return the isotherms as padded arrays (see ``Packed``)."""
    n = len(isotherms)
    counts = np.array([iso.n_points for iso in isotherms], dtype=np.int64)
    m = int(counts.max()) if n else 0
    pressure = np.empty((n, m))
    loading = np.empty((n, m))
    mask = np.zeros((n, m), dtype=bool)
    any_sigma = any(iso.sigma_mol_per_kg is not None for iso in isotherms)
    sigma = np.ones((n, m)) if any_sigma else None
    for i, iso in enumerate(isotherms):
        k = counts[i]
        pressure[i, :k] = iso.pressure_pa
        loading[i, :k] = iso.loading_mol_per_kg
        if k < m:
            pressure[i, k:] = iso.pressure_pa[-1]
            loading[i, k:] = iso.loading_mol_per_kg[-1]
        mask[i, :k] = True
        if sigma is not None:
            if iso.sigma_mol_per_kg is not None:
                sigma[i, :k] = iso.sigma_mol_per_kg
                sigma[i, k:] = iso.sigma_mol_per_kg[-1] if k else 1.0
            else:
                sigma[i, :] = np.nan  # this isotherm has no sigma: engine falls back
    return Packed(
        isotherm_ids=[iso.isotherm_id for iso in isotherms],
        sorbent_ids=[iso.sorbent_id for iso in isotherms],
        adsorbates=[iso.adsorbate for iso in isotherms],
        branches=[iso.branch for iso in isotherms],
        temperature_k=np.array([iso.temperature_k for iso in isotherms], dtype=float),
        pressure_pa=pressure,
        loading_mol_per_kg=loading,
        mask=mask,
        saturation_pressure_pa=np.array(
            [np.nan if iso.saturation_pressure_pa is None else iso.saturation_pressure_pa
             for iso in isotherms], dtype=float),
        sigma_mol_per_kg=sigma,
        surface_area_m2_per_g=np.array(
            [np.nan if iso.surface_area_m2_per_g is None else iso.surface_area_m2_per_g
             for iso in isotherms], dtype=float),
        n_points=counts,
    )
