"""A synthetic cohort of our own: varied ventricles to try ``fibers cohort`` on, and one broken case.

Subject ``k`` is drawn from ``seed + k`` alone, so a cohort of 10 begins with the same 5
subjects as a cohort of 5. Each varies the demo ventricle (:func:`fibers.demo.ventricle.demo_subject`)
in size (0.85-1.15 times), wall thickness (7-13 mm), shape (the cavity's ellipticity and a
thicker or thinner side), contour noise (0.2-0.8 mm), breath-hold shifts (0-3 mm) and its
position in the scanner; every third subject comes as a segmentation label map
(:mod:`fibers.demo.voxels`) instead of contours. The broken case has a contours file with a
value that is not a number, as a faulty export would give.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from fibers.demo.ventricle import SyntheticLV, oblique_frame

BROKEN = "broken-export"


@dataclass(frozen=True)
class CohortMember:
    """One synthetic subject and how it is sampled."""

    name: str
    lv: SyntheticLV
    as_labelmap: bool
    noise: float
    shift: float
    seed: int


def draw_member(k: int, seed: int = 0) -> CohortMember:
    """Subject ``k`` (0-based) of the synthetic cohort of ``seed``."""
    rng = np.random.default_rng([seed, k])
    scale = rng.uniform(0.85, 1.15)
    thickness = rng.uniform(7.0, 13.0)
    endo = (25.0 * scale * rng.uniform(0.92, 1.08), 57.0 * scale)
    epi = (endo[0] + thickness, endo[1] + 0.8 * thickness)
    rotation, translation = oblique_frame(seed * 1000 + k)
    lv = SyntheticLV(
        endo=endo, epi=epi, base_z=20.0 * scale,
        endo_waves=((2.0, rng.uniform(0.0, 0.08), rng.uniform(0, np.pi), 0.3),),
        epi_waves=((1.0, rng.uniform(0.0, 0.05), rng.uniform(0, 2 * np.pi), 0.5),
                   (2.0, rng.uniform(0.0, 0.04), rng.uniform(0, np.pi), 0.2)),
        rotation=rotation, translation=translation,
    )
    return CohortMember(name=f"subject-{k + 1:03d}", lv=lv, as_labelmap=(k % 3 == 2),
                        noise=float(rng.uniform(0.2, 0.8)), shift=float(rng.uniform(0.0, 3.0)),
                        seed=int(rng.integers(0, 2**31)))


def write_cohort(out, n: int, *, seed: int = 0, mesh_size: float = 1.5) -> list[Path]:
    """Write ``n`` subjects and the broken case, one folder each holding ``case.toml``.

    Returns the case files, the broken one last.
    """
    from fibers.io import case as case_io
    from fibers.io.contours import write_contours

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    cases = []
    for k in range(n):
        m = draw_member(k, seed)
        folder = out / m.name
        folder.mkdir(exist_ok=True)
        if m.as_labelmap:
            from fibers.demo import voxels
            from fibers.io.labelmap import write_labelmap

            labels, affine = voxels.voxelise(m.lv, spin_deg=float(m.seed % 90))
            write_labelmap(folder / "labelmap.nii.gz", labels, affine)
            text = case_io.case_text(landmarks=None, mesh_size=mesh_size).replace(
                'contours = "contours.csv"', 'labelmap = "labelmap.nii.gz"')
        else:
            contours, _ = m.lv.sample_stack(spacing=8.0, point_spacing=1.5, noise=m.noise, shift=m.shift,
                                            seed=m.seed)
            write_contours(folder / "contours.csv", contours)
            text = case_io.case_text(landmarks=m.lv.landmarks(), mesh_size=mesh_size)
        (folder / "case.toml").write_text(text)
        cases.append(folder / "case.toml")
    cases.append(_write_broken(out / BROKEN, seed, mesh_size))
    return cases


def _write_broken(folder: Path, seed: int, mesh_size: float) -> Path:
    """A subject whose contours file has 'n/a' in place of one coordinate."""
    from fibers.io import case as case_io
    from fibers.io.contours import write_contours

    folder.mkdir(parents=True, exist_ok=True)
    m = draw_member(0, seed + 1)
    contours, _ = m.lv.sample_stack(noise=m.noise, shift=m.shift, seed=m.seed)
    write_contours(folder / "contours.csv", contours)
    lines = (folder / "contours.csv").read_text().splitlines()
    bad = len(lines) // 3
    fields = lines[bad].split(",")
    fields[2] = "n/a"
    lines[bad] = ",".join(fields)
    (folder / "contours.csv").write_text("\n".join(lines) + "\n")
    (folder / "case.toml").write_text(case_io.case_text(landmarks=m.lv.landmarks(), mesh_size=mesh_size))
    return folder / "case.toml"
