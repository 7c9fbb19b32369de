"""Robot tracking: the fiducial(s) on the robot become a time-stamped floor pose track.

Per frame (:mod:`.frame_loop`): register the floor when due (:mod:`.registration_policy`),
detect the robot's markers with OpenCV's ``ArucoDetector`` or the AprilTag 3 library
(:mod:`.detector`, :mod:`.apriltag3`) in a window around where they are predicted (falling
back to the whole frame), map the corners to the floor through the frame's registration
on the plane at each marker's height and fit the robot's planar pose to all visible
corners at once (:mod:`.pose_fit`). Each detection is timed at its frame's presentation
time plus the rolling-shutter delay of the rows it sits in.

After the video (:mod:`.finish`): the corner noise is estimated from the fit residuals of
the whole run (:mod:`.noise`), and a Rauch-Tung-Striebel smoother (:mod:`.smooth`) turns
the detections into position, velocity and acceleration at every frame time, with a
1-sigma that adds the registration error and the detector's pixel locking
(:mod:`.pixel_lock`). Short gaps are bridged and flagged, long gaps
left NaN. The rolling-shutter readout time is also estimated from the shear it leaves in
the markers of moving frames; it is used when the camera profile gives none.

Entry point :func:`.tracker.track_video` with :class:`.settings.TrackSettings`; the track
and its CSV file in :mod:`.result`; the registrations a track was measured with in
:mod:`.floor_poses`. Submodules are imported where used (nothing is re-exported here), so
importing one part does not load OpenCV for the others.
"""
