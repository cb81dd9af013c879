"""The shared snapshot types: :class:`Snapshot` (fine-grid fields of one time step, what
closure.io reads) and :class:`CoarseSnapshot` (its filtered fields and exact subgrid terms,
what closure.residuals computes and closure.io writes and reads back).

They live here, below both modules, so neither has to import the other for its types;
closure.io and closure.residuals re-export them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from closure.filters import CoarseGraining
from closure.grid import Grid


@dataclass
class Snapshot:
    """One time step of fine-grid fields.

    ``fields`` maps our names (``u, v, w`` and scalar names) to float64 arrays of
    ``grid.shape``; ``index`` is the snapshot's position in the file; ``time`` its time
    coordinate (file units) or None. ``mask``: a boolean array of ``grid.shape``, True where
    the point is fluid (False on land or missing values), or None when every point is fluid.
    """

    fields: dict[str, np.ndarray]
    grid: Grid
    index: int
    time: float | None
    mask: np.ndarray | None = None
    #: the z level of a level stack (``open_fields(..., levels=...)``), else None
    level: int | None = None


@dataclass
class CoarseSnapshot:
    """Filtered fields and exact subgrid terms of one snapshot, on the coarse grid.

    ``fields``: filtered ``u, v[, w]``, scalars, and in 2-D ``vorticity``; ``targets``:
    ``tau_*``, ``force_*``, ``flux_<c>_*``, ``pi`` and in 2-D ``vorticity_forcing``,
    ``enstrophy_transfer``. Arrays are float64 of ``grid.shape`` (the coarse grid).
    """

    fields: dict[str, np.ndarray]
    targets: dict[str, np.ndarray]
    grid: Grid
    coarse_graining: CoarseGraining
    index: int
    time: float | None
    #: boolean array of the coarse grid's shape, True where the coarse point may enter fits
    #: and scores (its filter footprint and derivative stencils see no land); None: all valid
    valid: np.ndarray | None = None
    #: boolean array of the coarse grid's shape, True where the coarse point itself is fluid
    #: (filters: the fine point it samples; block averaging: a block with a fluid cell); land
    #: points hold 0 in ``fields`` and ``targets``. None: no land
    fluid: np.ndarray | None = None
    #: the land convention used ("zero" or "fluid"), None when the snapshot had no land
    land: str | None = None

    @property
    def velocity(self) -> tuple[str, ...]:
        return tuple(c for c in ("u", "v", "w") if c in self.fields)
