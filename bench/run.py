"""`make bench`: one table of stage times and ratios on the demo ventricle, in one run.

For each mesh size the whole pipeline runs in a fresh subprocess (so its peak memory is its
own); the FEM rows compare our assembly with scikit-fem's and our multigrid solve with scipy's
direct solver on the same mesh, and the pool rows time point location and pool sampling of 10^6
points on the ~500k mesh, the evaluator rows loading that build and answering 10^6 points. Ratios > 1 mean ours is faster; "after / mesh" is the time of every
stage after meshing (report excluded) over the meshing time (target <= 0.4 at ~500k); "gmsh" is
the volume fill inside the mesh stage (the rest of it is ours: boundary rings, orientation, face
tags, quality), and "after / gmsh" the same sum over it.

The cohort rows build 6 synthetic subjects of the default mesh size (``fibers demo --cohort``)
twice: one after another, each a ``fibers build`` process as a shell loop would run them, and
as one ``fibers cohort --workers 2``; the ratio is the serial time over the cohort's (target
>= 1.6 on 2 cores). Reports are left out of both (``--no-report``): they cost the same in both.
`bench/run.py cohort` runs the cohort rows alone.
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # as the command line does (fibers/cli.py)
HERE = Path(__file__).resolve().parent
SIZES = {"~50k": 2.2, "~200k": 1.3, "~500k": 0.97, "~1M": 0.77}
from fibers.pipeline import AFTER_MESH as AFTER  # noqa: E402  (the stages the manifest sums)


def one(size: float, with_pools_bench: bool) -> dict:
    import shutil
    import tempfile
    import time
    from dataclasses import replace

    sys.path.insert(0, str(HERE))
    from fem_bench import fem_rows

    from fibers import pipeline
    from fibers.demo import ventricle
    from fibers.io import case as case_io, outputs

    from fibers import mesh as mesh_stage

    lv = ventricle.demo_subject()
    contours, _ = lv.sample_stack(noise=0.4, shift=2.0, seed=11)
    case = case_io.resolve_case({"input": {"contours": "demo.csv"}, "mesh": {"size": size}})
    case = replace(case, landmarks=lv.landmarks())
    fill, fill_s = mesh_stage.fill_volume, []

    def timed_fill(*args, **kwargs):  # gmsh's share of the mesh stage, for the table
        t = time.perf_counter()
        try:
            return fill(*args, **kwargs)
        finally:
            fill_s.append(time.perf_counter() - t)

    mesh_stage.fill_volume = timed_fill
    out = Path(tempfile.mkdtemp(prefix="fibers-bench-"))
    try:  # as a build runs: files written while later stages run go into its folder meanwhile
        result = pipeline.run(contours, case, write_to=out)
    finally:
        mesh_stage.fill_volume = fill
    t0 = time.perf_counter()
    outputs.write_all(out, result)
    result.timings["outputs"] = time.perf_counter() - t0
    row = {"size": size, "tets": len(result.mesh.tets), "timings": result.timings, "gmsh_s": sum(fill_s),
           "fem": fem_rows(result.mesh)}
    if with_pools_bench:
        from evaluate_bench import evaluator_rows
        from pools_bench import pool_rows
        row["pools"] = pool_rows(result.mesh, result.coords, law=case.law, septum=result.septum)
        # the yardstick: 10^6 myocardium pool points with all fields, the same work per point
        # as the evaluator's (the pool stage itself now mostly overlaps the coordinates)
        row["evaluator_yardstick_s"] = next(p["seconds"] for p in row["pools"]
                                            if p["step"].startswith("pool myocardium"))
        outputs.write_manifest(out, outputs.manifest(result, case, []))
        row["evaluator"] = evaluator_rows(out, row["evaluator_yardstick_s"])
    shutil.rmtree(out, ignore_errors=True)
    row["peak_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    return row


def cohort_rows(n: int = 6, workers: int = 2) -> dict:
    """Seconds of n default-size subjects built one after another and as one cohort on Dask."""
    import shutil
    import tempfile
    import time

    from fibers.demo.cohort import write_cohort

    tmp = Path(tempfile.mkdtemp(prefix="fibers-bench-cohort-"))
    try:
        cases = write_cohort(tmp / "cases", n, seed=0)[:n]  # the broken case is left out
        fibers = [sys.executable, "-m", "fibers.cli"]
        t0 = time.perf_counter()
        for case in cases:
            subprocess.run(fibers + ["build", str(case), "--out", str(tmp / "serial" / case.parent.name),
                                     "--no-report"], check=True, capture_output=True)
        serial = time.perf_counter() - t0
        t0 = time.perf_counter()
        subprocess.run(fibers + ["cohort", *map(str, cases), "--out", str(tmp / "cohort"), "--workers", str(workers),
                                 "--no-report"], check=True, capture_output=True)
        parallel = time.perf_counter() - t0
        tets = [json.loads((tmp / "cohort" / c.parent.name / "manifest.json").read_text())["summary"]["counts"]["tetrahedra"]
                for c in cases]
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return {"subjects": n, "workers": workers, "serial_s": serial, "cohort_s": parallel,
            "ratio": serial / parallel, "tets_min": min(tets), "tets_max": max(tets)}


def print_cohort(c: dict) -> None:
    print(f"\nCohort throughput: {c['subjects']} subjects of {c['tets_min']:,}-{c['tets_max']:,} tetrahedra "
          f"(ratio = serial / cohort, target >= 1.6)")
    print(f"{'serial builds s':>16} {'cohort s':>9} {'workers':>8} {'ratio':>6}")
    print(f"{c['serial_s']:16.1f} {c['cohort_s']:9.1f} {c['workers']:8d} {c['ratio']:6.2f}")


def main() -> int:
    if len(sys.argv) == 4 and sys.argv[1] == "--one":
        print(json.dumps(one(float(sys.argv[2]), sys.argv[3] == "1"), default=float))
        return 0
    if len(sys.argv) == 2 and sys.argv[1] == "cohort":
        print_cohort(cohort_rows())
        return 0
    rows = []
    for label, size in SIZES.items():
        print(f"bench: {label} tetrahedra (mesh size {size} mm) ...", file=sys.stderr, flush=True)
        proc = subprocess.run([sys.executable, __file__, "--one", str(size), "1" if label == "~500k" else "0"],
                              capture_output=True, text=True)
        if proc.returncode != 0:
            print(proc.stderr[-2000:], file=sys.stderr)
            return 1
        rows.append(json.loads(proc.stdout.strip().splitlines()[-1]))

    print("\nStages on the demo ventricle (seconds; ratio = stage / meshing; gmsh = its volume fill, "
          "part of the mesh stage)")
    head = (f"{'tets':>9} {'mesh':>7} {'gmsh':>6} " + " ".join(f"{s:>12}" for s in AFTER)
            + f" {'after/mesh':>10} {'after/gmsh':>10} {'peak MB':>8}")
    print(head)
    print("-" * len(head))
    for r in rows:
        t = r["timings"]
        after = sum(t[s] for s in AFTER)
        cells = " ".join(f"{t[s]:6.2f} ({t[s] / t['mesh']:.2f})" for s in AFTER)
        print(f"{r['tets']:>9,} {t['mesh']:7.2f} {r['gmsh_s']:6.2f} {cells} {after / t['mesh']:10.2f} "
              f"{after / r['gmsh_s']:10.2f} {r['peak_mb']:8.0f}")

    print("\nFinite elements against references on the same mesh (ratio = reference / ours)")
    head = f"{'tets':>9} {'what':<20} {'ours s':>8} {'ref s':>8} {'ratio':>7}  reference"
    print(head)
    print("-" * len(head))
    for r in rows:
        for f in r["fem"]:
            print(f"{f['tets']:>9,} {f['name']:<20} {f['ours_s']:8.3f} {f['reference_s']:8.3f} {f['ratio']:7.1f}  {f['note']}")

    for r in rows:
        if "pools" in r:
            print(f"\nPoint location and pools, 10^6 points on {r['tets']:,} tetrahedra")
            print(f"{'step':<44} {'points':>9} {'seconds':>8} {'points/s':>10}")
            for p in r["pools"]:
                print(f"{p['step']:<44} {p['points']:>9} {p['seconds']:8.2f} {p['points_per_s']:10.3g}")
        if "evaluator" in r:
            print(f"\nField evaluator on {r['tets']:,} tetrahedra (ratio = seconds / 10^6 myocardium pool "
                  f"points with all fields, {r['evaluator_yardstick_s']:.2f} s; targets: load <= 2 s, "
                  f"10^6 points <= 2 s)")
            print(f"{'step':<44} {'points':>9} {'seconds':>8} {'ratio':>7}")
            for p in r["evaluator"]:
                print(f"{p['step']:<44} {p['points']:>9} {p['seconds']:8.2f} {p['ratio']:7.2f}")

    print("bench: cohort of 6 default-size subjects, serial and on 2 workers ...", file=sys.stderr, flush=True)
    print_cohort(cohort_rows())
    return 0


if __name__ == "__main__":
    sys.exit(main())
