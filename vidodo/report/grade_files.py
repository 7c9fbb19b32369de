"""Writing a graded run: drift.csv, events.csv, summary.json (and the truth track).

All files go through :func:`vidodo.outputs.staged_dir`, so a failure leaves the output
folder as it was. Numbers are SI; angles in radians unless a column says ``_deg``.

drift.csv
---------
One row per truth-track sample (video clock).

=============================  ======  ===============================================
column                         unit    meaning
=============================  ======  ===============================================
t_s                            s       video time of the sample
truth_x_m, truth_y_m           m       truth position, floor frame
truth_heading_rad              rad     truth heading, continuous
truth_sigma_xy_m               m       1-sigma of the truth position (per axis)
truth_sigma_heading_rad        rad     1-sigma of the truth heading
path_length_m                  m       truth path length since the start of the video
<src>_x_m, <src>_y_m           m       the source's position, anchored at motion start
<src>_heading_rad              rad     the source's heading, anchored, continuous
<src>_err_m                    m       distance from source position to truth
<src>_along_m                  m       error along the direction of travel (+ ahead)
<src>_cross_m                  m       error across it (+ to the left of travel)
<src>_heading_err_rad          rad     source minus truth heading, wrapped to [-pi, pi)
events                         --      event kinds active at the sample, ';'-separated
=============================  ======  ===============================================

``<src>`` is the source name with every character outside ``[a-z0-9]`` replaced by
``_`` (``tracking+imu`` -> ``tracking_imu``). Source columns are empty where the log
does not cover the sample. The direction of travel is that of the truth displacement
over a few centimetres around the sample, held while the robot stands (heading before
it first moves).

events.csv
----------
=================  ======  ===========================================================
column             unit    meaning
=================  ======  ===========================================================
kind               --      wheel_slip, shove, pod_lift, impact or heading_jump
t_start_s          s       onset, video clock
t_end_s            s       end, video clock
x_m, y_m           m       truth floor position at onset
magnitude          varies  metres lost (wheel_slip, pod_lift), metres pushed (shove),
                           peak deceleration (impact), heading change (heading_jump)
magnitude_unit     --      m, m/s^2 or rad
sources            --      odometry sources whose error changed over it, ';'-separated
detail             --      wheels involved, peak slip ratio, and the like
=================  ======  ===========================================================

summary.json
------------
``vidodo_version``; ``inputs`` (file paths); ``settings`` (event thresholds, anchor);
``clock`` (``offset_s`` [s] with ``t_video = t_log + offset_s``, ``sigma_s`` [s],
``confidence`` 0..1, ``method``, ``source``, ``rate`` and ``ref_log_s`` of the optional
rate term); ``truth`` (tracker quality figures); ``field`` (``tiles_x``, ``tiles_y``,
``tile_size_m`` [m]) when known; ``sources``, per name:
``ate_rmse_m``, ``rpe_0p5m_rmse_m``, ``rpe_1s_rmse_m`` [m] (keys named by the RPE
deltas, ``rpe_delta_m`` and ``rpe_delta_s``; pairs as ``settings.rpe_pairs`` says),
``final_err_m`` [m],
``final_heading_err_rad`` [rad], ``drift_pct`` [% of path], ``heading_drift_deg_per_turn``
[deg per full turn], ``max_err_m`` [m] and where (``max_err_t_s`` [s], ``max_err_x_m``,
``max_err_y_m`` [m]), ``path_length_m`` [m], ``coverage_s`` [s], ``best_fit_angle_rad``
[rad], ``best_fit_scale`` [-] (a Sim(2) fit's scale: a length-error diagnostic),
``pass`` (true, false, or null when no tolerance was set); ``events`` (the rows of
events.csv); ``tolerances``; ``verdict`` ('pass', 'fail' or 'graded');
``warnings`` (what could not be measured). A figure that could not be measured is
``null``, never a guess.

track.csv
---------
The truth track used, in the format of ``vidodo track`` (reusable with ``--track``).
"""

from __future__ import annotations

import json
from pathlib import Path

from ..csvsafe import write_csv
from ..outputs import staged_dir

__all__ = ["write_outputs", "OUTPUT_FILES"]

OUTPUT_FILES = ("drift.csv", "events.csv", "summary.json", "track.csv")


def write_outputs(result, out_dir, *, write_track=True) -> list[Path]:
    """Write a :class:`~vidodo.pipeline.GradeResult` into ``out_dir``.

    Parameters
    ----------
    result : GradeResult
    out_dir : str or Path
        Folder to write (staged: nothing half-written on failure).
    write_track : bool
        Also write ``track.csv`` (the truth track, reusable with ``--track``).

    Returns
    -------
    list of Path
        The files written.
    """
    out = Path(out_dir)
    names = []
    with staged_dir(out) as stage:
        write_csv(result.drift, stage / "drift.csv", float_format="%.6g")
        names.append("drift.csv")
        write_csv(result.events, stage / "events.csv", float_format="%.6g")
        names.append("events.csv")
        with open(stage / "summary.json", "w", encoding="utf-8") as fh:
            json.dump(result.summary, fh, indent=2, allow_nan=False)
            fh.write("\n")
        names.append("summary.json")
        if write_track:
            write_csv(result.truth, stage / "track.csv", float_format="%.7g")
            names.append("track.csv")
            poses = getattr(result, "floor_poses", None)
            if poses is not None and len(poses):
                from ..tracking.floor_poses import write_floor_poses

                write_floor_poses(poses.registrations, stage / "track.floor.csv",
                                  detection_readout_s=poses.detection_readout_s)
                names.append("track.floor.csv")
    return [out / n for n in names]
