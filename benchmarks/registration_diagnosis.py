"""Where the automatic floor registration first goes wrong, stage by stage, per scene.

Each scene of ``registration_robustness.py`` (same seeds, same cache, same command
``vidodo register PICTURE --field field.toml [--camera camera.toml]``) is registered
once with the pipeline's intermediate results recorded on the side (wrappers around
the grid search's functions; the pipeline itself is not changed), and each stage is
compared with the scene's truth (the renderer's camera: every tile-seam line and tile
corner projected into the picture):

1. ``families``: the two seam families (vanishing points) found at all;
2. ``directions``: each family's lines, mapped to the floor through the true camera,
   run along one floor axis (a perpendicular drift of at most 0.25 tile over the
   part in view), and the two families on different axes;
3. ``spacing``: each family's periodic lattice lines (spacing and phase,
   :func:`vidodo.registration.grid.periodic.lattice_lines`) lie on true seam lines
   (within 0.15 tile) with consecutive lines one tile apart;
4. ``window``: some candidate field window's corners lie on true tile corners (the
   lattice) and cover exactly the field (its place in the tiling);
5. ``fit``: the candidate with the right window was fitted on the seams (an error
   otherwise) and chosen;
6. ``orientation``: the chosen fit maps the field corners within 5 mm of truth up to
   the field's square symmetries (else the lattice was right but not its orientation
   or origin);
7. ``selfcheck``: the fitted registration is correct (<= 5 mm RMS at the corners in
   view) but refused; ``correct`` when it passed; ``wrong_passed`` when a wrong
   registration reached exit 0.

The first stage that diverges is reported per scene, with the refusal message; the
table counts scenes by first divergent stage (on the acceptance subset: at least 12
field corners in view, seams visible). Per-scene rows go to a CSV.

Run: ``nice -n 10 .venv/bin/python benchmarks/registration_diagnosis.py --cache
/tmp/lat/cache [--seeds 0-239] [--all] [--start-tile] [--csv /tmp/diagnosis.csv]``;
without ``--all`` only the acceptance subset is run (seeds outside it are skipped after
loading); ``--start-tile`` adds the class with the scene's start tile given, as
``registration_robustness.py --start-tile`` registers it.
"""

from __future__ import annotations

import argparse
import csv
import sys
import tempfile
from collections import Counter
from pathlib import Path

import cv2
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

import registration_robustness as rb  # noqa: E402

from vidodo.synth import scenes  # noqa: E402

STAGES = ("families", "directions", "spacing", "window", "fit", "orientation", "selfcheck",
          "wrong_passed", "correct")
COLUMNS = ("seed", "class", "class_start", "stage", "subset", "exit_code", "rms_mm",
           "fit_rms_mm", "height_m", "true_height_m", "n_corners", "lens_profile", "detail",
           "message")
_REC: dict = {}
#: A family's vanishing point counts as grossly wrong beyond this angle, seen from the
#: floor part of the picture [deg]: the spacing fit (a projective model of the line
#: index) and the seam refinement absorb smaller errors (registrations within 2 mm
#: came from first vanishing points 2-3 deg off); a smaller error that matters shows
#: in the spacing stage.
VP_TOL_DEG = 3.0


def _install_recorders():
    """Wrap the grid search's stages to record their results (scoring only)."""
    from vidodo.registration import registrar, selfcheck
    from vidodo.registration.grid import lattice, search

    if getattr(lattice._families, "_diag", False):
        return

    def wrap(module, name, key, many=False):
        original = getattr(module, name)

        def recorder(*args, **kwargs):
            try:
                out = original(*args, **kwargs)
            except Exception as exc:
                _REC.setdefault(key + "_errors", []).append(exc)
                raise
            if many:
                _REC.setdefault(key, []).append((args, out))
            else:
                _REC[key] = (args, out)
            return out

        recorder._diag = True
        setattr(module, name, recorder)

    wrap(lattice, "_families", "families")
    wrap(lattice, "_rectified", "rectified", many=True)
    wrap(lattice, "_periodic_lattices", "periodic")
    wrap(search, "initial_lattice", "initial")
    wrap(search, "_fit_lattice", "fit", many=True)
    wrap(registrar.selfcheck, "check_reference", "check")
    assert selfcheck.check_reference is registrar.selfcheck.check_reference


def _to_floor(spec, px_small, shrink):
    """Floor points [tiles] seen at lattice-search pixels (shrunk frame), NaN off floor."""
    px = (np.asarray(px_small, float).reshape(-1, 2) + 0.5) / shrink - 0.5
    w, h = spec.setup.camera.width_px, spec.setup.camera.height_px
    ok = np.all(np.isfinite(px), axis=1) & (px[:, 0] >= 0) & (px[:, 0] < w) & (
        px[:, 1] >= 0) & (px[:, 1] < h)
    out = np.full((len(px), 2), np.nan)
    if ok.any():
        out[ok] = scenes.floor_at_pixels(spec, px[ok]) / spec.field.tile_size_m
    return out


def _true_vps(spec, shrink):
    """The true vanishing points of the floor's x and y lines in the lattice search's
    conditioned frame (undistorted pixels of the shrunk picture, centred and scaled)."""
    cam = spec.setup.camera
    w, h = cam.width_px, cam.height_px
    ws, hs = max(int(round(w * shrink)), 1), max(int(round(h * shrink)), 1)
    sx, sy = ws / w, hs / h
    k = np.array([[cam.fx_px * sx, 0, (cam.cx_px + 0.5) * sx - 0.5],
                  [0, cam.fy_px * sy, (cam.cy_px + 0.5) * sy - 0.5], [0, 0, 1]])
    scale = 2.0 / np.hypot(ws, hs)
    cond = np.array([[scale, 0, -ws / 2 * scale], [0, scale, -hs / 2 * scale], [0, 0, 1]])
    rot = cv2.Rodrigues(np.asarray(spec.setup.rvec, float))[0]
    pts = (np.array([[u, v] for u in np.linspace(0, ws, 7) for v in np.linspace(0.3 * hs, hs, 5)])
           - [ws / 2, hs / 2]) * scale
    return [cond @ k @ rot[:, a] for a in (0, 1)], pts


def _vp_error_deg(vp, true, pts):
    """Largest angle between the directions to ``vp`` and to ``true`` over ``pts`` [deg]."""
    def ang(v):
        d = v[:2][None, :] - pts * v[2]
        return np.arctan2(d[:, 1], d[:, 0])
    return float(np.degrees(np.max(np.abs(np.angle(np.exp(2j * (ang(vp) - ang(true))))) / 2)))


def _vp_errors(spec, shrink, fams):
    """Per family of the chosen pair: (nearest true axis, angle error [deg])."""
    call = next((a for a, out in _REC.get("rectified", []) if out is fams), None)
    if call is None:
        return None
    true, pts = _true_vps(spec, shrink)
    out = []
    for vp, _inl in (call[1], call[2]):
        errs = [_vp_error_deg(np.asarray(vp, float), t, pts) for t in true]
        out.append((int(np.argmin(errs)), float(min(errs))))
    return out


def _line_floor(fams, f, rho, spec, shrink):
    """Floor points [tiles] along the family line at ``rho`` (in view only)."""
    t = np.linspace(-50, 50, 4001)
    # Along the line: from the reference point, the span covered by the family's rho
    # range (the rectified frame's scale); clipped to the image afterwards.
    span = max(float(f["rhos"][-1] - f["rhos"][0]), 1e-9)
    pts = f["ref"] + rho * f["normal"] + (t[:, None] * span / 5.0) * f["dir"]
    img = fams.to_image(pts)
    fl = _to_floor(spec, img, shrink)
    good = np.all(np.isfinite(fl), axis=1)
    # The longest run of points in view along the line: beyond the image's line at
    # infinity (and where a lens model folds over) the line maps back into the frame.
    edges = np.flatnonzero(np.diff(np.r_[0, good.astype(int), 0]))
    if len(edges) == 0:
        return np.zeros((0, 2))
    starts, ends = edges[::2], edges[1::2]
    k = int(np.argmax(ends - starts))
    fl = fl[starts[k]:ends[k]]
    # Only over the field and one tile around it (far off, near the horizon, a tiny
    # direction error drifts by many tiles and no seam there is used).
    n = np.array([spec.field.tiles_x, spec.field.tiles_y])
    return fl[np.all((fl >= -1) & (fl <= n + 1), axis=1)]


def _family_axis(fams, f, spec, shrink):
    """Which floor axis the family's lines run along, and their perpendicular drift
    [tiles] over the part in view (worst of a few lines across the family)."""
    seen = f["rhos"][f["seen"]]
    if len(seen) < 2:
        return None, np.inf
    worst, axes = 0.0, []
    for q in (0.2, 0.5, 0.8):
        fl = _line_floor(fams, f, float(np.quantile(seen, q)), spec, shrink)
        if len(fl) < 10:
            continue
        ext = np.ptp(fl, axis=0)
        along = int(np.argmax(ext))
        axes.append(along)
        worst = max(worst, float(ext[1 - along]))
    if not axes:
        return None, np.inf
    axis = Counter(axes).most_common(1)[0][0]
    return (axis if len(set(axes)) == 1 else None), worst


def _family_lines_ok(fams, f, axis, spec, shrink):
    """Whether the family's periodic lattice lines lie on true seams one tile apart;
    with a short description."""
    from vidodo.registration.grid.periodic import family_period, lattice_lines, line_rho

    per = family_period(f)
    if not per:
        return False, "no periodic spacing"
    ln = lattice_lines(f, per[0][0], per[0][1])
    if ln is None:
        return False, "fewer than 3 lattice lines"
    ks = np.arange(ln["k_lo"], ln["k_hi"] + 1)
    coords = []
    for k in ks:
        fl = _line_floor(fams, f, float(line_rho(ln, k)), spec, shrink)
        coords.append(float(np.median(fl[:, 1 - axis])) if len(fl) >= 5 else np.nan)
    c = np.array(coords)
    good = np.isfinite(c)
    if good.sum() < 3:
        return False, "lines out of view"
    step = np.diff(c[good]) / np.diff(ks[good])
    frac = np.abs(c[good] - np.round(c[good]))
    # Most lines (the outermost may bend off with the lens or rectification error).
    ok = bool(np.mean(frac < 0.15) >= 0.8 and np.mean(np.abs(np.abs(step) - 1) < 0.15) >= 0.8)
    return ok, (f"{good.sum()} lines, step {np.median(np.abs(step)):.2f} tile, "
                f"off-seam {np.max(frac):.2f} tile")


def _window_state(lat_small, spec, shrink, vis=None):
    """'right', 'lattice' (on tile corners, other place) or 'off' for one window."""
    nx, ny = spec.field.tiles_x, spec.field.tiles_y
    fl = _to_floor(spec, lat_small.reshape(-1, 2), shrink).reshape(nx + 1, ny + 1, 2)
    ok = np.all(np.isfinite(fl), axis=-1)
    if vis is not None:
        ok &= np.asarray(vis, bool)
    if ok.sum() < 4:
        return "off"
    t = np.round(fl[ok])
    if np.max(np.abs(fl[ok] - t)) > 0.2:
        return "off"
    ii, jj = np.meshgrid(np.arange(nx + 1), np.arange(ny + 1), indexing="ij")
    idx = np.column_stack([ii[ok], jj[ok], np.ones(ok.sum())])
    a = np.linalg.lstsq(idx, t, rcond=None)[0]  # (3, 2): index -> true tile corner
    if np.max(np.abs(idx @ a - t)) > 0.01:
        return "off"
    corners = np.array([[0, 0, 1], [nx, 0, 1], [0, ny, 1], [nx, ny, 1]]) @ a
    lo, hi = corners.min(axis=0), corners.max(axis=0)
    return "right" if np.allclose(lo, 0) and np.allclose(hi, [nx, ny]) else "lattice"


def _reg_rms_mm(reg, scene):
    px, true_m = rb._truth_points(scene)
    if reg is None or not len(px):
        return np.nan, np.nan
    est = np.asarray(reg.image_to_floor(px), float)
    rms = float(np.sqrt(np.nanmean(np.sum((est - true_m) ** 2, axis=1)))) * 1e3
    return rms, rb._lattice_rms_mm(est, true_m, scene.spec.field.tile_size_m)


def diagnose(seed: int, cache, lens="scene", start_tile=False) -> dict:
    """Register one scene with the stages recorded; the first divergent stage.

    ``start_tile``: also the class with the scene's start tile given, as ``grade``
    registers (``registration_robustness._register_with_start_tile``; ``class_start``).
    """
    rb._install_spy()
    _install_recorders()
    scene = rb._rendered(seed, cache)
    spec = scene.spec
    with_lens = lens == "always" or (lens == "scene" and spec.lens_profile)
    _REC.clear()
    with tempfile.TemporaryDirectory(prefix=f"diag{seed}-") as tmp:
        picture = scenes.save_scene(scene, Path(tmp))
        code, message, reg = rb._register(picture, Path(tmp), with_lens)
        rec = dict(_REC)
        _REC.clear()  # the second registration records afresh; the first's is kept
        started = (rb._register_with_start_tile(scene, picture, Path(tmp), with_lens)
                   if start_tile else None)
    _REC.clear()
    _REC.update(rec)
    w, h = spec.setup.camera.width_px, spec.setup.camera.height_px
    from vidodo.registration.grid.search import LATTICE_DIAG_PX

    shrink = LATTICE_DIAG_PX / np.hypot(w, h)
    if shrink > 0.9:
        shrink = 1.0
    else:
        shrink = max(int(round(w * shrink)), 1) / w
    checked = _REC.get("check", ((None, None, None), None))[0]
    fitted = checked[2] if checked[0] is not None else reg
    rms, _lat = _reg_rms_mm(reg if code == 0 else None, scene)
    fit_rms, fit_lat = _reg_rms_mm(fitted, scene)
    height = float(fitted.camera_centre_m[2]) if fitted is not None else np.nan
    row = {"seed": seed, "exit_code": code, "rms_mm": rms, "fit_rms_mm": fit_rms,
           "height_m": height, "true_height_m": float(spec.setup.height_m),
           "n_corners": len(scene.corners), "lens_profile": with_lens,
           "message": message if code != 0 else "",
           "subset": len(scene.corners) >= 12 and scene.seams_visible}
    row["stage"], row["detail"] = _first_stage(scene, shrink, code, fit_rms, fit_lat)
    # The class as registration_robustness.py scores it.
    row["class"] = ("refused" if code == 3 else "correct" if code == 0 and rms <= rb.CORRECT_MM
                    else "wrong")
    row["class_start"] = row["class"]
    if started is not None:
        px, true_m = rb._truth_points(scene)
        row["class_start"] = rb._classify(started[0], started[2], px, true_m,
                                          spec.field.tile_size_m)[0]
    return row


def _first_stage(scene, shrink, code, fit_rms, fit_lat):
    spec = scene.spec
    if code == 0:
        rms, _ = fit_rms, fit_lat
        return ("correct", "") if rms <= rb.CORRECT_MM else ("wrong_passed", f"{rms:.1f} mm")
    if "families" not in _REC:
        errs = _REC.get("families_errors", [])
        return "families", str(errs[0]) if errs else "no lattice search"
    fams = _REC["families"][1]
    axes, details = [], []
    for f in fams.fam:
        axis, drift = _family_axis(fams, f, spec, shrink)
        axes.append(axis)
        details.append(f"axis {axis} drift {drift:.2f} tile")
    vps = _vp_errors(spec, shrink, fams)
    if vps is not None:
        details = [f"vp {'xy'[a]} {e:.2f} deg" for a, e in vps] + details
        if vps[0][0] == vps[1][0] or max(e for _a, e in vps) > VP_TOL_DEG:
            return "directions", "; ".join(details)
        axes = [a for a, _e in vps]
    elif any(a is None for a in axes) or axes[0] == axes[1] or any(
            not d.endswith("tile") or float(d.split()[-2]) > 0.25 for d in details):
        return "directions", "; ".join(details)
    for f, axis in zip(fams.fam, axes, strict=True):
        ok, what = _family_lines_ok(fams, f, axis, spec, shrink)
        if not ok:
            return "spacing", f"family along {'xy'[axis]}: {what}"
    cands = _REC.get("initial", (None, None))[1]
    if cands is None:
        return "window", "no candidate window"
    states = [_window_state(c[0], spec, shrink, c[2]) for c in cands[0]]
    if "right" not in states:
        return "window", "candidates: " + ",".join(states) if states else "no candidates"
    right = states.index("right")
    fits = _REC.get("fit", [])
    errs = _REC.get("fit_errors", [])
    if len(fits) + len(errs) == 0:
        return "fit", "no candidate fitted"
    # Which candidates' fits succeeded: recorder args hold the lattice.
    target = cands[0][right][0]
    fitted_ok = any(a[2][0].shape == target.shape
                    and np.allclose((a[2][0] + 0.5) * shrink - 0.5, target, atol=1.0)
                    for a, _out in fits)
    if not fitted_ok:
        return "fit", "right window not fitted: " + "; ".join(str(e)[:60] for e in errs)
    if not np.isfinite(fit_rms):
        return "fit", "no fitted registration reached the check"
    if fit_rms > rb.CORRECT_MM:
        if fit_lat <= rb.CORRECT_MM:
            return "orientation", f"{fit_rms:.0f} mm, lattice {fit_lat:.1f} mm"
        return "fit", f"chosen fit {fit_rms:.0f} mm (lattice {fit_lat:.0f} mm)"
    return "selfcheck", f"fit {fit_rms:.1f} mm refused"


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seeds", default=None)
    ap.add_argument("--cache", type=Path, default=None)
    ap.add_argument("--all", action="store_true", help="not only the acceptance subset")
    ap.add_argument("--lens", choices=("scene", "always", "never"), default="scene")
    ap.add_argument("--csv", type=Path, default=Path(tempfile.gettempdir()) /
                    "registration_diagnosis.csv")
    ap.add_argument("--start-tile", action="store_true",
                    help="also the class with the scene's start tile given (as grade)")
    args = ap.parse_args(argv)
    seeds = rb._parse_seeds(args.seeds) if args.seeds else list(scenes.BENCHMARK_SEEDS)
    rows = []
    with open(args.csv, "w", newline="") as fh:
        wr = csv.DictWriter(fh, fieldnames=COLUMNS, extrasaction="ignore")
        wr.writeheader()
        for s in seeds:
            if not args.all:
                scene = rb._rendered(s, args.cache)
                if not (len(scene.corners) >= 12 and scene.seams_visible):
                    continue
            r = diagnose(s, args.cache, args.lens, args.start_tile)
            rows.append(r)
            wr.writerow({k: (f"{v:.4g}" if isinstance(v, float) else v) for k, v in r.items()})
            fh.flush()
            print(f"seed {s:4d}: {r['stage']:<12} exit {r['exit_code']} fit "
                  f"{r['fit_rms_mm']:.1f} mm h {r['height_m']:.2f}/{r['true_height_m']:.2f} "
                  f"| {r['detail'][:70]} | {r['message'][:70]}", file=sys.stderr, flush=True)
    for ln in stage_table(rows):
        print(ln)
    print(f"per-scene rows: {args.csv}")
    return 0


def stage_table(rows) -> list[str]:
    """Scenes by first divergent stage: all run, and the acceptance subset."""
    out = [f"{'first divergent stage':<24}{'all':>6}{'subset':>8}"]
    for st in STAGES:
        n_all = sum(r["stage"] == st for r in rows)
        n_sub = sum(r["stage"] == st and r["subset"] for r in rows)
        out.append(f"{st:<24}{n_all:>6}{n_sub:>8}")
    out.append(f"{'total':<24}{len(rows):>6}{sum(r['subset'] for r in rows):>8}")
    for key, name in (("class", "class"), ("class_start", "with start tile")):
        if key == "class_start" and all(r["class_start"] == r["class"] for r in rows):
            break
        for kind in ("correct", "refused", "wrong"):
            out.append(f"{name + ' ' + kind:<24}{sum(r[key] == kind for r in rows):>6}"
                       f"{sum(r[key] == kind and r['subset'] for r in rows):>8}")
    return out


if __name__ == "__main__":
    cv2.setNumThreads(1)
    sys.exit(main())
