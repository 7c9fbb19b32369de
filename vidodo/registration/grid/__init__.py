"""The automatic tile grid: find the floor's tile seams and fit the field's N x M grid.

Steps (no markers, no clicks):

1. Line segments (LSD, von Gioi et al., IEEE PAMI 32(4), 2010; also on the frame's
   main colour axis, so that tiles of equal brightness but different colour show their
   edges) are grouped by vanishing points, each found by RANSAC over segment pairs and
   refined by least squares (up to five directions, strongest first). Pairs of them
   are tried strongest first, then, for the three strongest, the pair with the
   perpendicular floor direction searched on its polar line with respect to the image
   of the absolute conic (one segment per hypothesis, a long segment held to two
   pixels at its ends, refined only while its support grows: a weak seam family beside
   strong tape or print is found; :mod:`.directions`); only pairs that can be
   perpendicular on the floor (the
   image of the absolute conic with the lens, or some focal length a lens has without
   it) and have all their segments on one side of the line through both (the floor's
   horizon; a vertical direction is perpendicular to the floor's too); the first pair
   whose both families show a periodic lattice wins.
2. The line through both vanishing points (the floor's horizon) is sent to infinity;
   in that affinely rectified frame each family is a set of parallel, equally spaced
   lines (an affine map keeps ratios along parallel lines; Hartley & Zisserman,
   *Multiple View Geometry*, 2nd ed., section 2.7). Spacing and phase of each family
   come from a matched filter over the dense seam evidence across it (teeth on seams
   against points half a spacing off), refined as a 1-D projective map of the line
   index (:mod:`.periodic`); this needs only part of the field in view. The dense
   evidence is accumulated over the image's pixels, each binned by its line position
   (:mod:`.cover`), so that lines near the camera and near the horizon are sampled
   alike.
3. The field's ``tiles_x + 1`` by ``tiles_y + 1`` lines are placed among the lattice
   lines where the tiling visibly ends (else by a guess of whole tiles, which the
   self-check refuses unless the caller fixes it); windows of whole-field combs (the
   field's line count, most seam evidence) are candidates too. The corner named by
   ``origin_hint`` (as seen from the camera) or the one that puts a visible floor
   fiducial where the profile says becomes the origin, with x and y right-handed
   (z up); the near edge and its left end are told from the edges' points in front of
   the camera, so the near corners may be out of the picture or behind the camera.
4. The lattice corners give a first camera fit; :func:`refine_fit` then samples the
   image across every seam, locates the seam to a fraction of a pixel, and fits pose,
   focal length and radial distortion to all seam samples (a seam must be straight on
   the floor, so its bending in the image measures the lens distortion).
"""

from .draw import draw_registration
from .lattice import CORNER_NAMES, TILING_CONTINUES
from .seams import MAX_MM_PER_PX, SeamSearch, locate_seams, refine_fit, seam_samples
from .search import LATTICE_DIAG_PX, GridResult, find_grid

__all__ = ["GridResult", "find_grid", "refine_fit", "seam_samples", "draw_registration",
           "SeamSearch", "locate_seams",
           "CORNER_NAMES", "LATTICE_DIAG_PX", "MAX_MM_PER_PX", "TILING_CONTINUES"]
