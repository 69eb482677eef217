"""Where a model lives in k-space: a periodic lattice or a continuum (k·p) window.

Lattice models carry Bravais vectors and orbital positions (Å).  Their Hamiltonians use Bloch
phases that include the orbital positions (docs/theory.md §2.5, "convention I"), the
physical choice for anomalous velocity, curvature dipole and connection polarizability.  The
periodic gauge needed by lattice Chern numbers is recovered by multiplying eigenvectors with
``exp(i k·τ_α)``.

Continuum models are integrated over all of k-space around the listed ``centers``; ``scale``
is a characteristic wavevector (1/Å) used only to place mesh points: a number, or a
module-level function of the parameter pytree (traced with them, so changing parameter values
never recompiles).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Lattice:
    """Periodic crystal: ``vectors`` are the rows a_i (Å), ``positions`` the orbital
    positions τ_α (Å, one row per orbital of a Hamiltonian block)."""

    vectors: tuple[tuple[float, ...], ...]
    positions: tuple[tuple[float, ...], ...]

    def __post_init__(self):
        a = np.asarray(self.vectors, dtype=float)
        if a.ndim != 2 or a.shape[0] != a.shape[1] or a.shape[0] not in (2, 3):
            raise ValueError(f"Lattice: vectors must be a 2x2 or 3x3 table of rows in Å, got shape {a.shape}.")
        if not np.all(np.isfinite(a)):
            raise ValueError(f"Lattice: vectors must be finite numbers in Å, got {self.vectors!r}.")
        if abs(np.linalg.det(a)) < 1e-12:
            raise ValueError("Lattice: the Bravais vectors are linearly dependent (zero cell volume).")
        pos = np.asarray(self.positions, dtype=float)
        if pos.ndim != 2 or pos.shape[1] != a.shape[0]:
            raise ValueError(f"Lattice: positions must have one {a.shape[0]}-component row per orbital.")
        if not np.all(np.isfinite(pos)):
            raise ValueError(f"Lattice: orbital positions must be finite numbers in Å, got {self.positions!r}.")

    @property
    def dim(self) -> int:
        return len(self.vectors)

    @property
    def periodic(self) -> bool:
        return True

    def vectors_array(self) -> np.ndarray:
        return np.asarray(self.vectors, dtype=float)

    def reciprocal(self) -> np.ndarray:
        """Rows b_j with a_i·b_j = 2π δ_ij (1/Å)."""
        return 2 * np.pi * np.linalg.inv(self.vectors_array()).T

    def cell_measure(self) -> float:
        """Cell area (Å², 2D) or volume (Å³, 3D)."""
        return float(abs(np.linalg.det(self.vectors_array())))


@dataclass(frozen=True)
class Continuum:
    """k·p window: the model is defined on all of R^d around each center (1/Å)."""

    dim: int
    centers: tuple[tuple[float, ...], ...] = ((0.0, 0.0),)
    scale: float = 0.05

    def __post_init__(self):
        if self.dim not in (2, 3):
            raise ValueError(f"Continuum: dim must be 2 or 3, got {self.dim}.")
        for c in self.centers:
            if len(c) != self.dim:
                raise ValueError(f"Continuum: each center needs {self.dim} components, got {c}.")
            if not np.all(np.isfinite(np.asarray(c, dtype=float))):
                raise ValueError(f"Continuum: centers must be finite wavevectors in 1/Å, got {c}.")
        if not callable(self.scale) and not 0 < self.scale < np.inf:
            raise ValueError("Continuum: scale must be a positive finite wavevector in 1/Å, or a function "
                             "params -> wavevector (module-level, so it can be traced).")

    def scale_for(self, params):
        """The mesh-placement wavevector (1/Å): ``scale(params)`` if callable (traceable, so new
        parameter values do not recompile), else the fixed number."""
        return self.scale(params) if callable(self.scale) else self.scale

    @property
    def periodic(self) -> bool:
        return False
