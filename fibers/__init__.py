"""fibers: from a short-axis contour stack to a left-ventricular wall mesh that carries cardiac
coordinates, a rule-based myofiber architecture, the 17 AHA segments and sample-point pools.

A research tool, not a medical device: nothing it writes is a diagnosis.
"""

__version__ = "0.1.0"


def __getattr__(name):
    # fibers.open(build_dir) without importing the evaluator (and scipy) on ``import fibers``
    if name == "open":
        from fibers.evaluate import open as open_build

        return open_build
    raise AttributeError(f"module 'fibers' has no attribute {name!r}")
