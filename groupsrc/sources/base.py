"""The source-space contract: what statistics and outputs may know of where sources are.

Every source space (a volume grid, a cortical mesh) honours this contract;
``tests/test_sources_contract.py`` checks each implementation against it:

* ``kind`` -- a short name ("volume", "surface");
* ``n_sources`` -- number of sources, > 0;
* ``coords_mm`` -- (n_sources, 3) float world coordinates in millimetres;
* ``neighbor_kinds`` -- the names ``adjacency`` accepts; the first is the default;
* ``adjacency(kind)`` -- (n_sources, n_sources) scipy CSR matrix, symmetric,
  boolean, no self loops: which sources are neighbours;
* ``labels()`` -- a table with one row per source locating it in its files
  (a volume: voxel indices i, j, k; a mesh: hemisphere and vertex);
* ``describe()`` -- a JSON-able description for the run record.

Statistics see only ``n_sources`` and an adjacency matrix; the time axis is
apart (:class:`~groupsrc.sources.timeaxis.TimeAxis`).
"""

from __future__ import annotations

from abc import ABC, abstractmethod

import numpy as np
import pandas as pd
from scipy import sparse


class SourceSpace(ABC):
    """Abstract source space; see the module docstring for the contract."""

    kind: str = "abstract"
    neighbor_kinds: tuple = ()

    @property
    @abstractmethod
    def n_sources(self) -> int:
        """Number of sources."""

    @property
    @abstractmethod
    def coords_mm(self) -> np.ndarray:
        """(n_sources, 3) world coordinates in mm."""

    @abstractmethod
    def adjacency(self, kind: str | None = None) -> sparse.csr_matrix:
        """Symmetric boolean neighbour matrix without self loops."""

    @abstractmethod
    def labels(self) -> pd.DataFrame:
        """One row per source: where it is in its files."""

    @abstractmethod
    def describe(self) -> dict:
        """JSON-able description (kind, size, geometry)."""
