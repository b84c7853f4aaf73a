"""Both ventricles: the biventricular route, stage by stage, beside the left-ventricular one.

- :mod:`.inputs`: the right-ventricular contours split off the left ones, the choice of route;
- :mod:`.surfaces`: the right cavity and the outer surface as radial widths over the left
  epicardium, fitted slice by slice and joined along the long axis;
- :mod:`.mesh`: one conforming tetrahedral mesh of the whole wall (gmsh), faces tagged
  1 LV endocardium, 2 epicardium, 3 base, 4 RV endocardium, cells in regions
  1 LV free wall, 2 septum, 3 RV free wall;
- :mod:`.coordinates`: Laplace fields from each endocardium and the epicardium, the septal
  depth, frames blended between the ventricles (Bayer et al., Ann Biomed Eng 2012);
- :mod:`.regions`: AHA segments on the left ventricle, basal / mid / apical thirds of the
  right free wall.

The left-ventricular route is untouched when no right-ventricular input is given.
"""
