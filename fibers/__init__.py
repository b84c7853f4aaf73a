"""fibers: from a short-axis contour stack to a left-ventricular wall mesh that carries cardiac
coordinates, a rule-based myofiber architecture, the 17 AHA segments and sample-point pools.

A research tool, not a medical device: nothing it writes is a diagnosis.
"""

__version__ = "0.1.0"
