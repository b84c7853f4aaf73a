"""Synthetic subjects of our own, for the demo, the examples and the tests.

:mod:`.ventricle` is the analytic left ventricle (its surfaces, volumes, landmarks and the
short-axis contour stacks sampled from it); :mod:`.voxels` turns it into a label map. No patient
data is used anywhere.
"""
