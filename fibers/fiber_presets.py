"""Published fiber rules, selectable as ``[fibers] preset = "..."`` in the case file.

Each preset is a set of ``[fibers]`` values and the publication they come from. The values are
quoted from memory of the papers (said so beside each); check them against the source before
relying on them. Keys given in the case file beside a preset override the preset's value, and
the manifest records the preset in full (``parameters.fibers.preset_record``).
"""

from __future__ import annotations

PRESETS: dict[str, dict] = {
    "bayer2012": {
        "source": "Bayer, Blake, Plank, Trayanova. A novel rule-based algorithm for assigning "
                  "myocardial fiber orientation to computational heart models. Ann Biomed Eng "
                  "40(10):2243-2254, 2012 (values from memory)",
        "notes": "Laplace-Dirichlet rule-based method: angles linear in the Laplace depth, laid "
                 "out in the Laplace frame; helix +40 at the endocardium to -50 at the epicardium, "
                 "sheet -65 to +25 degrees (the values of the paper's left-ventricular examples).",
        "values": {"helix_endo": 40.0, "helix_epi": -50.0, "sheet_angle_endo": -65.0,
                   "sheet_angle_epi": 25.0, "imbrication_endo": 0.0, "imbrication_epi": 0.0,
                   "depth": "laplace", "helix_frame": "laplace"},
    },
    "streeter1969": {
        "source": "Streeter, Spotnitz, Patel, Ross, Sonnenblick. Fiber orientation in the canine "
                  "left ventricle during diastole and systole. Circ Res 24(3):339-347, 1969 "
                  "(profile shape from memory)",
        "notes": "Histological helix angle across the wall in diastole, about +60 at the "
                 "endocardium through 0 at mid-wall to -60 at the epicardium, measured against "
                 "the circumferential direction at fractions of the wall thickness; the "
                 "intermediate points of the table are an approximate reading from memory.",
        "values": {"helix_profile": [[0.0, 60.0], [0.1, 52.0], [0.25, 35.0], [0.5, 0.0],
                                     [0.75, -35.0], [0.9, -52.0], [1.0, -60.0]],
                   "helix_endo": 60.0, "helix_epi": -60.0,
                   "sheet_angle_endo": 0.0, "sheet_angle_epi": 0.0,
                   "depth": "thickness", "helix_frame": "short_axis"},
    },
}


def preset_record(name: str) -> dict:
    """The preset ``name`` in full: ``name``, ``source``, ``notes`` and ``values``."""
    entry = PRESETS[name]
    return {"name": name, "source": entry["source"], "notes": entry["notes"],
            "values": {k: v for k, v in entry["values"].items()}}
