"""Floor registration: every frame's pixels mapped to floor metres, and back.

Modules, in the order the data flows:

``frame``          one frame's registration (:class:`FrameRegistration`)
``camera_fit``     camera model and pose fitted to points and seam samples
``floor_markers``  floor fiducials found in a frame
``grid``           the automatic tile grid (segments, lattice, seams, preview)
``registrar``      the reference frame and every later frame (:class:`FloorRegistrar`)
"""
