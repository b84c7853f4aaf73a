"""Resolved build parameters: one frozen dataclass per case-file table, with the defaults.

The case file (DESIGN.md section 3.2) is parsed and range-checked in ``fibers.io.case``; the
stages only ever see these objects.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class FiberLaw:
    """Helix and transverse angle laws over transmural depth, degrees.

    The default is linear from the endocardial to the epicardial value. ``helix_profile``, when
    given, replaces the linear helix law by a table of (depth, angle) pairs, depth 0 at the
    endocardium and 1 at the epicardium, interpolated linearly.
    """

    helix_endo: float = 60.0
    helix_epi: float = -60.0
    transverse_endo: float = 0.0
    transverse_epi: float = 0.0
    helix_profile: tuple[tuple[float, float], ...] | None = None


@dataclass(frozen=True)
class PoolSettings:
    """Sample-point pool counts and sampling options."""

    myocardium: int = 100_000
    cavity: int = 20_000
    background: int = 100_000
    endo: int = 10_000
    epi: int = 10_000
    base: int = 10_000
    seed: int = 0
    sampler: str = "random"   # "random" or "sobol"
    margin: float = 10.0      # mm the contours' bounding box is grown by for the background
    float32: bool = False     # store float fields as float32 (half the memory in training loops)


@dataclass(frozen=True)
class Box:
    """An oriented box: ``corner`` (3,) mm plus the three edge vectors as rows of ``edges``."""

    corner: np.ndarray
    edges: np.ndarray

    def sample(self, unit: np.ndarray) -> np.ndarray:
        """Map points of the unit cube (N, 3) into the box."""
        return self.corner + np.einsum("...j,ji->...i", np.asarray(unit, float), self.edges)

    @property
    def volume(self) -> float:
        return float(abs(np.linalg.det(self.edges)))


@dataclass(frozen=True)
class Landmarks:
    """Right-ventricular insertion points, mm, world frame; ``source`` says where they came from."""

    rv_insertion_anterior: np.ndarray | None = None
    rv_insertion_inferior: np.ndarray | None = None
    source: str = "none"

    @property
    def present(self) -> bool:
        return self.rv_insertion_anterior is not None and self.rv_insertion_inferior is not None
