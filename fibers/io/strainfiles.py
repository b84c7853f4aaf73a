"""``fibers strain``: read a build and a motion, analyse, and write the strain folder atomically.

The folder holds ``segments.csv`` (one row per frame and segment), ``summary.json`` (peaks and
the incompressibility check), ``strain.xdmf`` + ``strain.h5`` (a time series on the mesh, cell
and recovered nodal fields, for ParaView-style viewers), ``manifest.json`` (inputs with sha256,
conventions, versions, timings) and ``report/index.html``. It is written to a temporary folder
beside ``--out`` and renamed at the end, so a failure leaves nothing behind.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import logging
import platform
import time
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

import fibers
from fibers import strain
from fibers.io import motion as motion_io

log = logging.getLogger("fibers")

CSV_QUANTITIES = strain.QUANTITIES + ("abs_J_minus_1",)
NODAL_DIRECTIONS = ("e_rad", "e_circ", "e_long", "fiber", "sheet", "sheet_normal")


@dataclass
class StrainRun:
    """What one ``fibers strain`` computes, in memory (the files are written from it)."""

    mesh: motion_io.BuildMesh
    motion: motion_io.Motion
    study: strain.StrainStudy
    nodal: dict
    summary: dict
    warnings: list


def analyse(build_dir, motion_path, *, fit_degree: int = 1) -> StrainRun:
    """Read the build and the motion, and compute every cell, node and segment value.

    ``fit_degree`` is the degree of the local fit of scattered samples (1 affine, 2 quadratic).
    """
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        mesh = motion_io.read_build_mesh(build_dir)
        motion = motion_io.read_motion(motion_path, mesh, degree=fit_degree)
        frames = strain.cell_frames(mesh.tets, mesh.point_fields, mesh.cell_fields)
        result = strain.study(mesh.points, mesh.cells, motion.displacement, frames, mesh.labels)
        _warn_inverted(result, mesh)
        if not (mesh.labels > 0).any():
            warnings.warn("the build has no AHA segment labels (no landmarks): only segment 0, the whole wall, is reported")
    nodal = nodal_fields(mesh, motion, result)
    notes = [str(w.message) for w in record]
    summary = summarise(mesh, motion, result, nodal, notes)
    return StrainRun(mesh=mesh, motion=motion, study=result, nodal=nodal, summary=summary, warnings=notes)


def nodal_fields(mesh, motion, result) -> dict:
    """Recovered nodal fields (T, N) per quantity.

    F is recovered at each node as the volume-weighted mean of the cells around it, and the
    quantities are computed from that F on the build's nodal frames (so nodal J is the
    determinant of a recovered F, not a mean of determinants). For tetra10 cells the cell's F is
    the Gauss-weighted mean of its four Gauss-point values.
    """
    cells = mesh.cells
    if cells.shape[1] == 10:
        grads, weights = strain.quadrature_gradients(mesh.points, cells)
        weights = np.abs(weights)
        volume = weights.sum(axis=1)

        def cell_F(u):
            Fq = strain.quadrature_deformation_gradients(grads, cells, u)
            return np.einsum("mq,mqij->mij", weights, Fq) / volume[:, None, None]
    else:
        grads, volume = strain.shape_gradients(mesh.points, cells)

        def cell_F(u):
            return strain.deformation_gradients(grads, cells, u)
    frames = {k: mesh.point_fields[k] for k in NODAL_DIRECTIONS if k in mesh.point_fields}
    out = {q: np.empty((len(motion.displacement), len(mesh.points))) for q in strain.QUANTITIES}
    unused = ~np.isin(np.arange(len(mesh.points)), cells)
    for t, u in enumerate(motion.displacement):
        F = cell_F(u).reshape(len(cells), 9)
        Fn = strain.nodal_average(F.T, cells, volume, len(mesh.points)).T.reshape(-1, 3, 3)
        Fn[unused] = np.eye(3)     # nodes of no cell: a neutral value rather than NaN for viewers
        values = strain.kinematics(Fn, frames)
        for q in strain.QUANTITIES:
            out[q][t] = values.get(q, np.nan)
    return out


def _warn_inverted(result, mesh) -> None:
    per_frame = result.inverted.sum(axis=1)
    for t in np.flatnonzero(per_frame):
        cells = np.flatnonzero(result.inverted[t])
        segs, counts = np.unique(result.labels[cells], return_counts=True)
        where = ", ".join(f"{int(s)} ({int(c)})" for s, c in zip(segs, counts))
        first = np.round(result.centroids[cells[0]], 1).tolist()
        warnings.warn(f"frame {int(t)}: {len(cells)} inverted tetrahedra (J <= 0) in segments {where}, first near "
                      f"{first} mm; they are left out of the segment means; check the displacement there")


def summarise(mesh, motion, result, nodal, notes) -> dict:
    """summary.json: peaks, the incompressibility check, inverted cells, the fit."""
    vol = result.volume
    dev = np.abs(result.cell["J"] - 1.0)
    valid = ~result.inverted
    w = np.where(valid, vol, 0.0)
    per_frame = (dev * w).sum(axis=1) / np.maximum(w.sum(axis=1), 1e-300)
    lumped = np.bincount(mesh.cells.ravel(), weights=np.repeat(vol / mesh.cells.shape[1], mesh.cells.shape[1]),
                         minlength=len(mesh.points))
    nodal_dev = (np.abs(nodal["J"] - 1.0) * lumped).sum(axis=1) / lumped.sum()
    seg_J = result.segments["J"]
    present = [int(s) for s in range(18) if result.volume_ml[s] > 0]
    return {
        "frames": int(len(motion.displacement)),
        "time_ms": [None if not np.isfinite(t) else float(t) for t in motion.time_ms],
        "source": motion.source,
        "segments_present": present,
        "segment_volume_ml": {str(s): round(float(result.volume_ml[s]), 4) for s in present},
        "peaks": strain.peaks(result, motion.time_ms),
        "incompressibility": {
            "cell_mean_abs_J_minus_1": {"per_frame": [round(float(v), 6) for v in per_frame],
                                        "max_over_frames": float(per_frame.max())},
            "cell_max_abs_J_minus_1": float(np.where(valid, dev, 0.0).max()),
            "segment_mean_J_max_deviation": float(np.nanmax(np.abs(seg_J[:, present] - 1.0))),
            "nodal_mean_abs_J_minus_1": {"per_frame": [round(float(v), 6) for v in nodal_dev],
                                         "max_over_frames": float(nodal_dev.max())},
            "note": "cell values: J of the P1 gradient per tetrahedron, which carries the interpolation error of "
                    "a curved motion on straight-edged cells (first order in the cell size); segment means of J "
                    "and the recovered nodal J converge faster",
        },
        "segment_mean_abs_J_minus_1_over_frames": {
            str(s): round(float(np.nanmean(result.abs_J_minus_1[:, s])), 6) for s in present},
        "inverted": [{"frame": int(t), "cells": int(n)} for t, n in enumerate(result.inverted.sum(axis=1)) if n],
        "fit": motion.fit,
        "warnings": list(notes),
    }


# ----------------------------------------------------------------------------- writing

def write_segments_csv(path: Path, result: strain.StrainStudy, time_ms: np.ndarray) -> None:
    """``frame, time_ms, segment, volume_ml`` and every quantity, one row per frame and segment."""
    present = [s for s in range(18) if result.volume_ml[s] > 0]
    columns = {**result.segments, "abs_J_minus_1": result.abs_J_minus_1}
    lines = [",".join(("frame", "time_ms", "segment", "volume_ml") + CSV_QUANTITIES)]
    for t in range(len(time_ms)):
        tm = "" if not np.isfinite(time_ms[t]) else f"{time_ms[t]:.6g}"
        for s in present:
            values = ",".join("" if not np.isfinite(columns[q][t, s]) else f"{columns[q][t, s]:.8g}"
                              for q in CSV_QUANTITIES)
            lines.append(f"{t},{tm},{s},{result.volume_ml[s]:.6g},{values}")
    path.write_text("\n".join(lines) + "\n")


def write_time_series(folder: Path, run: StrainRun) -> None:
    """``strain.xdmf`` + ``strain.h5``: displacement and nodal fields, cell fields, per frame.

    float32 keeps the file half the size; the time of each step is ``time_ms`` or the frame index.
    """
    import meshio

    mesh, study = run.mesh, run.study
    times = run.motion.time_ms
    times = np.where(np.isfinite(times), times, np.arange(len(times)))
    # meshio's TimeSeriesWriter opens its .h5 by bare name in the working directory
    with contextlib.chdir(folder), meshio.xdmf.TimeSeriesWriter("strain.xdmf") as writer:
        writer.write_points_cells(mesh.points, [("tetra10" if mesh.cells.shape[1] == 10 else "tetra", mesh.cells)])
        for t, tm in enumerate(times):
            point_data = {"displacement": run.motion.displacement[t].astype(np.float32)}
            point_data.update({q: v[t].astype(np.float32) for q, v in run.nodal.items()})
            cell_data = {f"{q}_cell": [v[t].astype(np.float32)] for q, v in study.cell.items()}
            cell_data["aha_segment"] = [study.labels.astype(np.int32)]
            cell_data["inverted"] = [study.inverted[t].astype(np.int8)]
            writer.write_data(float(tm), point_data=point_data, cell_data=cell_data)


def manifest(run: StrainRun, build_dir: Path, motion_path: Path, timings: dict) -> dict:
    import meshio
    import scipy

    def sha(p):
        return hashlib.sha256(Path(p).read_bytes()).hexdigest()
    return {
        "tool": "fibers", "kind": "strain", "version": fibers.__version__,
        "caution": "Research tool, not a medical device; its output is not a diagnosis.",
        "inputs": [{"path": str(Path(build_dir) / "mesh.vtu"), "sha256": sha(Path(build_dir) / "mesh.vtu"),
                    "mesh_checksum": run.mesh.checksum, "order": run.mesh.order},
                   {"path": str(motion_path), "sha256": sha(motion_path), "source": run.motion.source}],
        "conventions": dict(strain.CONVENTIONS),
        "fit": run.motion.fit,
        "versions": {"python": platform.python_version(), "numpy": np.__version__, "scipy": scipy.__version__,
                     "meshio": meshio.__version__},
        "warnings": run.warnings,
        "timings_s": timings,
    }


def write_strain_folder(build_dir, motion_path, out, *, report: bool = True, fit_degree: int = 1) -> dict:
    """Analyse a motion on a build and write the whole strain folder atomically. Returns the summary."""
    from fibers.io import folder

    out, build_dir, motion_path = Path(out), Path(build_dir), Path(motion_path)
    folder.check_out(folder.resolve_out(out), inputs=(build_dir / "mesh.vtu", motion_path))
    timings = {}
    t0 = time.perf_counter()
    run = analyse(build_dir, motion_path, fit_degree=fit_degree)
    timings["analyse"] = round(time.perf_counter() - t0, 4)
    for message in run.warnings:
        log.warning("%s", message)
    s = run.study.segments
    log.info("%-13s %7.2f s  %d frames on %s tetrahedra (%s input); whole wall peak strain_cc %.3f, strain_rr %.3f",
             "strain", timings["analyse"], len(run.motion.displacement), f"{len(run.mesh.tets):,}", run.motion.source,
             np.nanmin(s["strain_cc"][:, 0]), np.nanmax(s["strain_rr"][:, 0]))
    with folder.staged(out, inputs=(build_dir / "mesh.vtu", motion_path)) as tmp:
        t1 = time.perf_counter()
        write_segments_csv(tmp / "segments.csv", run.study, run.motion.time_ms)
        (tmp / "summary.json").write_text(json.dumps(run.summary, indent=2) + "\n")
        write_time_series(tmp, run)
        timings["outputs"] = round(time.perf_counter() - t1, 4)
        log.info("%-13s %7.2f s  segments.csv, summary.json, strain.xdmf", "outputs", timings["outputs"])
        if report:
            from fibers.report.strain import write_strain_report

            t2 = time.perf_counter()
            write_strain_report(tmp, run, name=out.name)
            timings["report"] = round(time.perf_counter() - t2, 4)
            log.info("%-13s %7.2f s  report/index.html", "report", timings["report"])
        timings["total"] = round(time.perf_counter() - t0, 4)
        record = manifest(run, build_dir, motion_path, timings)
        record["files"] = folder.listing(tmp)
        (tmp / "manifest.json").write_text(json.dumps(record, indent=2) + "\n")
    log.info("%-13s %7.2f s  wrote %s", "total", timings["total"], out)
    return run.summary
