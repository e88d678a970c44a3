"""The server's streams at startup: every configured stream's bundle loaded and checked, each
distinct (bundle, threshold) once and shared, so two actors on one rig cost one set of sessions."""

from __future__ import annotations

import logging
from pathlib import Path

from rigcast.runtime.serve.config import ServerConfig
from rigcast.runtime.solve.pipeline import StreamModel, StreamState, load_stream_model
from rigcast.runtime.trust.reload import check_served, public_model

log = logging.getLogger(__name__)


def open_streams(cfg: ServerConfig) -> dict[str, StreamState]:
    """{stream id: its state} for every configured stream. Raises BundleError (or the reload
    checks' errors: size caps, ONNX external data) naming the bundle."""
    models: dict[tuple[Path, float | None], StreamModel] = {}
    streams: dict[str, StreamState] = {}
    for s in cfg.streams:
        key = (s.bundle.resolve(), s.off_manifold_threshold)
        model = models.get(key)
        if model is None:
            check_served(s.bundle, cfg)  # size caps, no ONNX external data
            model = public_model(load_stream_model(
                s.bundle, threads=cfg.threads, threshold=s.off_manifold_threshold,
                factor=cfg.off_manifold_factor))
            models[key] = model
        streams[s.stream] = StreamState(s, model, cfg.window)
        rule = (f"fit RMS above {model.fixed_threshold:.4g}" if model.fixed_threshold is not None
                else f"adaptive, floor {model.floor:.4g}")
        log.info("stream %s: bundle %s (%d vertices, %d controls, off-manifold: %s)",
                 s.stream, s.bundle, model.vertex_count, model.bundle.control_count, rule)
    return streams
