"""Options shared by the verbs that register the floor (``grade``, ``track``,
``register``): points, start tile, camera height; and the refusal's preview image."""

from __future__ import annotations

from pathlib import Path

from ..errors import InputError
from ..outputs import atomic_file
from ..profiles import parse_start_tile


def add_arguments(parser, *, points=True):
    """Add ``--points``, ``--start-tile`` and ``--camera-height-m`` to a verb."""
    if points:
        parser.add_argument("--points", type=Path,
                            help="CSV u_px,v_px,x_m,y_m of floor points in the first frame "
                            "(tile corners you picked) instead of the automatic tile grid")
    parser.add_argument("--start-tile", metavar="I,J",
                        help="the tile the robot starts on, counted from 0 along x and y "
                        "(default: the field profile's start_tile); fixes the field's "
                        "place when its origin is out of view")
    parser.add_argument("--camera-height-m", type=float, metavar="M",
                        help="the camera's approximate height above the floor [m]; a "
                        "registration more than 25%% off is refused")


def registrar_from_args(args, field, camera, *, relative_ok=True):
    """A :class:`FloorRegistrar` for the verb's options."""
    from ..registration.registrar import FloorRegistrar, RegistrarSettings
    from ..registration.selfcheck import CheckLimits

    start = field.start_tile
    if getattr(args, "start_tile", None):
        start = parse_start_tile(args.start_tile, field.tiles_x, field.tiles_y,
                                 "--start-tile")
    height = getattr(args, "camera_height_m", None)
    if height is not None and not height > 0:
        raise InputError("--camera-height-m must be positive")
    settings = RegistrarSettings(limits=CheckLimits(camera_height_m=height),
                                 relative_ok=relative_ok, start_tile=start)
    return FloorRegistrar(field, camera, points_csv=getattr(args, "points", None),
                          settings=settings)


def write_preview(exc, path: Path) -> None:
    """Write the preview a refused registration carries (if any) to ``path``."""
    import cv2  # here, so a verb's options and refusals need no vision library

    preview = getattr(exc, "preview_bgr", None)
    if preview is None:
        return
    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_file(path) as tmp:
        ok, buf = cv2.imencode(".png", preview)
        if not ok:
            raise InputError(f"{path}: cannot encode the preview image")
        tmp.write_bytes(buf.tobytes())
