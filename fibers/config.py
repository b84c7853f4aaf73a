"""Resolved build parameters: one frozen dataclass per case-file table, with the defaults.

The case file (README, "Case file") is parsed and range-checked in ``fibers.io.case``; the
stages only ever see these objects.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class FiberLaw:
    """The rule that turns cardiac coordinates into fiber, sheet and sheet-normal, degrees.

    Every angle is an endocardial and an epicardial value joined linearly over the depth, unless
    a table replaces it; :mod:`fibers.architecture` documents the rule and the README the keys.

    Attributes
    ----------
    helix_endo, helix_epi : float, degrees
        Helix angle, measured in the frame named by ``helix_frame``.
    sheet_angle_endo, sheet_angle_epi : float, degrees
        Rotation of the sheet about the fiber (0: the sheet lies along the wall normal).
    imbrication_endo, imbrication_epi : float, degrees
        Tilt of the fiber out of the wall's tangent plane, toward the epicardium when positive.
    helix_profile, sheet_profile : tuple of (depth, angle) pairs, optional
        Tables over depth (0 endocardium, 1 epicardium) replacing the linear laws, interpolated
        linearly.
    helix_apicobasal, sheet_apicobasal : tuple of (position, degrees) pairs, optional
        Offsets added over the apicobasal position (0 apex, 1 base), interpolated linearly.
    helix_septal_offset, sheet_septal_offset : float, degrees
        Added in the septum with a weight that falls smoothly to 0 on the free wall.
    dispersion_endo, dispersion_epi : float
        The fiber dispersion kappa of Gasser, Ogden and Holzapfel (2006), 0 (aligned) to 1/3
        (isotropic), linear over depth.
    depth : {"thickness", "laplace"}
        The depth the laws use: the fraction of the wall thickness, or the Laplace solution.
    helix_frame : {"short_axis", "laplace"}
        The frame the helix angle is laid out in: the short-axis circumferential direction of
        imaging, or the Laplace frame ``e_circ``, ``e_long``.
    preset : str, optional
        The name of the published preset the values came from.
    """

    helix_endo: float = 60.0
    helix_epi: float = -60.0
    sheet_angle_endo: float = 0.0
    sheet_angle_epi: float = 0.0
    helix_profile: tuple[tuple[float, float], ...] | None = None
    imbrication_endo: float = 0.0
    imbrication_epi: float = 0.0
    sheet_profile: tuple[tuple[float, float], ...] | None = None
    helix_apicobasal: tuple[tuple[float, float], ...] | None = None
    sheet_apicobasal: tuple[tuple[float, float], ...] | None = None
    helix_septal_offset: float = 0.0
    sheet_septal_offset: float = 0.0
    dispersion_endo: float = 0.0
    dispersion_epi: float = 0.0
    depth: str = "thickness"
    helix_frame: str = "short_axis"
    preset: str | None = None


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
