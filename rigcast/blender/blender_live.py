"""Live in Blender: subscribe to a server's controls and drive a `.blend` rig frame by frame.

Run it with a Python that has ``bpy`` (the ``blender`` extra), headless::

    python -m rigcast.blender.blender_live tamsin.blend --bones jaw:x --from tcp://127.0.0.1:5571 \\
        --stream tamsin [--frames N] [--log applied.jsonl]

Each controls message of the stream sets the rig's controls that the bundle's schema names
(matched by name; a control the rig lacks is reported once and skipped), then updates the view
layer so drivers and the depsgraph run. ``--log`` writes one JSON line per applied frame: the
frame number and the values read back from Blender after setting them. In an interactive
Blender, run ``live_loop`` from a timer (``bpy.app.timers``) with ``timeout_ms=0`` per tick.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
from pathlib import Path
from typing import Any

import numpy as np

log = logging.getLogger(__name__)


def live_loop(rig: Any, subscriber: Any, *, schema_names: list[str] | None = None,
              max_frames: int | None = None, idle_timeout_s: float = 10.0,
              log_file: Any = None) -> int:
    """Apply controls messages to ``rig`` (a ``blender_scene.BlendRig``) until ``max_frames``
    or ``idle_timeout_s`` without one; returns the number of frames applied. ``schema_names``:
    the published controls' names (None: the rig's own order)."""
    import time

    from rigcast.runtime.messaging.protocol import ControlsMessage

    names = [c.name for c in rig.controls]
    applied = 0
    last = time.monotonic()
    order: np.ndarray | None = None
    while max_frames is None or applied < max_frames:
        msg = subscriber.recv(timeout_ms=100)
        if not isinstance(msg, ControlsMessage):
            if time.monotonic() - last > idle_timeout_s:
                break
            continue
        last = time.monotonic()
        if order is None:
            order = _order(names, schema_names, msg.values.shape[0])
        values = rig.current()
        known = order >= 0
        values[known] = msg.values[order[known]]
        rig.apply(values)
        applied += 1
        if log_file is not None:
            log_file.write(json.dumps({"frame": msg.frame, "values": rig.current().tolist()})
                           + "\n")
    return applied


def _order(rig_names: list[str], schema_names: list[str] | None, width: int) -> np.ndarray:
    """For each rig control, its column in the published values (-1: not published)."""
    if schema_names is None:
        if width != len(rig_names):
            raise ValueError(f"the server publishes {width} controls, the rig has "
                             f"{len(rig_names)}; pass --to so names can be matched")
        return np.arange(width)
    index = {n: i for i, n in enumerate(schema_names)}
    missing = [n for n in rig_names if n not in index]
    if missing:
        log.warning("controls not published by the server, left as they are: %s", missing)
    return np.array([index.get(n, -1) for n in rig_names])


def main(argv: list[str] | None = None) -> int:
    from rigcast.blender.blender_scene import BlendError, BlendRig
    from rigcast.runtime.messaging.client import ControlsSubscriber

    p = argparse.ArgumentParser(prog="python -m rigcast.blender.blender_live", description=__doc__,
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("blend")
    p.add_argument("--object", default=None)
    p.add_argument("--bones", default="", help="comma-separated BONE:AXES, as for the build")
    p.add_argument("--from", dest="source", default="tcp://127.0.0.1:5571")
    p.add_argument("--to", default=None, help="the server's input endpoint, to match names")
    p.add_argument("--stream", required=True)
    p.add_argument("--frames", type=int, default=None)
    p.add_argument("--idle", type=float, default=10.0, help="stop after this many idle seconds")
    p.add_argument("--log", type=Path, default=None)
    p.add_argument("--ready", type=Path, default=None, help="touch this file once subscribed")
    args = p.parse_args(argv)
    logging.basicConfig(level=logging.INFO, format="%(levelname)s %(name)s: %(message)s")
    try:
        rig = BlendRig(args.blend, args.object, [b for b in args.bones.split(",") if b])
    except BlendError as exc:
        sys.stderr.write(f"rigcast blender live: {exc}\n")
        return 1
    schema_names = None
    if args.to:
        from rigcast.live.record import fetch_schema

        schema_names = list(fetch_schema(args.to, args.stream, 5.0).names)
    with ControlsSubscriber(args.stream, args.source) as sub:
        if args.ready is not None:
            args.ready.touch()
        log_file = args.log.open("w") if args.log else None
        try:
            applied = live_loop(rig, sub, schema_names=schema_names, max_frames=args.frames,
                                idle_timeout_s=args.idle, log_file=log_file)
        finally:
            if log_file is not None:
                log_file.close()
    sys.stderr.write(f"applied {applied} frames to {rig.ob.name}\n")
    return 0 if applied else 1


if __name__ == "__main__":
    sys.exit(main())
