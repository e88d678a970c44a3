"""The live server: mesh frames in on a ROUTER, controls, telemetry and events out on a PUB.

One thread, one poller, a small loop: startup (load and check every bundle, open the sessions,
bind), the main loop (wait, drain the queued messages, keep the newest mesh per stream, process
each stream's newest frame, then the fit error), a periodic telemetry tick, and shutdown (driven
by a flag that SIGINT/SIGTERM set; a second signal forces the exit).

Load policy, per drain: at most ``max_drain`` messages are read (by default the input queue's
capacity, so a sender faster than the server cannot keep a drain from ever reaching a frame);
every message read is decoded and validated; a valid mesh that a newer one of the same stream
supersedes is counted as *dropped*; a mesh whose sender timestamp is not newer than the stream's
last processed one is counted as *stale* and dropped; a bad message gets an error reply to its
sender, an ``evt`` event and a count by reason. Nothing is dropped silently. The next published
frame after drops carries the STALE flag (it follows skipped input).

Off the frame's path: the fit error runs after the drain's publishes, only while no input
waits and within ``fit_error_max_share`` of the time (a fit that took d is followed by at least
d (1 - share) / share without one; the frames in between are counted as skipped). The
telemetry tick and the garbage collector's passes run right after a drain (when the next frame
is furthest away), or on a timer when no frames come.

Waiting: ``busy_poll_us`` > 0 makes the loop poll the input without sleeping for that long after
each drain, yielding the CPU between polls so the ZeroMQ I/O thread, which shares the core, is
never starved; then it blocks in the poller as usual.

Reload: a ``reload`` request loads and checks the new bundle on a background thread while frames
keep flowing; the stream's model is swapped between two frames. A bundle with another vertex count
or control schema is refused (reload_reply ok=false) and the stream keeps its bundle; an accepted
reload keeps the filter state, since the controls mean the same.
"""

from __future__ import annotations

import gc
import logging
import math
import os
import queue
import signal
import threading
import time
from collections import Counter
from dataclasses import replace
from pathlib import Path
from types import FrameType
from typing import Any

import numpy as np
import zmq
from rigcast.runtime import protocol
from rigcast.runtime.align import AlignError
from rigcast.runtime.bundle import BundleError
from rigcast.runtime.config import ServerConfig, is_loopback
from rigcast.runtime.inference import ORT_ERRORS
from rigcast.runtime.one_euro import FilterError
from rigcast.runtime.pipeline import (
    FrameResult,
    StreamModel,
    StreamState,
    check_compatible,
    head_pose,
    load_stream_model,
)
from rigcast.runtime.schema import SchemaError
from rigcast.runtime.sockets import bind_pub, bind_router, bound_endpoint, close_all

log = logging.getLogger(__name__)

_TICK_CAP_S = 0.05  # the loop wakes at least this often to see stop flags and reload results
_FULL_GC_EVERY = 100  # ticks between full collections (10 s at the default 10 Hz)
_Pending = tuple[bytes, protocol.MeshFrame, int, int, int, Any]


class Server:
    """Holds the running state. ``run()`` blocks until ``request_stop()`` or a signal."""

    def __init__(self, config: ServerConfig, ctx: zmq.Context | None = None) -> None:
        self.config = config
        self.ctx = ctx or zmq.Context.instance()
        self.streams: dict[str, StreamState] = {}
        self.router: zmq.Socket | None = None
        self.pub: zmq.Socket | None = None
        self.input_endpoint = ""
        self.output_endpoint = ""
        self.should_exit = False
        self.force_exit = False
        self.started = threading.Event()
        self.rejected: Counter[str] = Counter()
        self.t_start_ns = time.time_ns()
        self._reloads: queue.SimpleQueue[tuple[bytes, str, StreamModel | str]] = (
            queue.SimpleQueue())
        self._reloading: set[str] = set()
        self._next_tick = 0.0
        self._ticks = 0
        self._next_fit_ns = 0  # perf_counter_ns before which no fit error starts (time share)

    # --- lifecycle -------------------------------------------------------------------------

    def startup(self) -> None:
        """Load every bundle (each distinct path once), open sessions, bind. Raises BundleError,
        sockets.BindError."""
        cfg = self.config
        models: dict[tuple[Path, float | None], StreamModel] = {}
        for s in cfg.streams:
            key = (s.bundle.resolve(), s.off_manifold_threshold)
            model = models.get(key)
            if model is None:
                model = load_stream_model(s.bundle, threads=cfg.threads,
                                          threshold=s.off_manifold_threshold,
                                          factor=cfg.off_manifold_factor)
                models[key] = model
            self.streams[s.stream] = StreamState(s, model, cfg.window)
            rule = (f"fit RMS above {model.fixed_threshold:.4g}"
                    if model.fixed_threshold is not None
                    else f"adaptive, floor {model.floor:.4g}")
            log.info("stream %s: bundle %s (%d vertices, %d controls, off-manifold: %s)",
                     s.stream, s.bundle, model.vertex_count, model.bundle.control_count, rule)
        for endpoint in (cfg.input, cfg.output):
            if not is_loopback(endpoint):
                log.warning("binding %s: the server is reachable from the network; keep it on a "
                            "closed stage network", endpoint)
        self.router = bind_router(self.ctx, cfg.input, rcvhwm=cfg.input_hwm,
                                  sndhwm=cfg.output_hwm, linger_ms=cfg.linger_ms,
                                  max_message_bytes=cfg.max_message_bytes)
        try:
            self.pub = bind_pub(self.ctx, cfg.output, sndhwm=cfg.output_hwm,
                                linger_ms=cfg.linger_ms)
        except OSError:
            close_all(self.router, linger_ms=0)
            raise
        self.input_endpoint = bound_endpoint(self.router)
        self.output_endpoint = bound_endpoint(self.pub)
        log.info("serving: mesh frames in on %s, controls out on %s", self.input_endpoint,
                 self.output_endpoint)
        self.started.set()

    def request_stop(self) -> None:
        """Ask the loop to exit (any thread); it does within about 50 ms."""
        self.should_exit = True

    def install_signal_handlers(self) -> None:
        if threading.current_thread() is not threading.main_thread():
            return
        signal.signal(signal.SIGINT, self._on_signal)
        signal.signal(signal.SIGTERM, self._on_signal)

    def _on_signal(self, signum: int, frame: FrameType | None) -> None:
        if self.should_exit:
            self.force_exit = True
            raise SystemExit(128 + signum)
        log.info("signal %s: shutting down", signal.Signals(signum).name)
        self.should_exit = True

    def run(self) -> None:
        if not self.started.is_set():
            self.startup()
        # Everything loaded at startup is long-lived: keep it out of the collector's passes.
        # The automatic collector is off while serving (it would run inside a frame whenever
        # allocations cross its threshold); tick() collects instead, between frames.
        gc.freeze()
        was_enabled = gc.isenabled()
        gc.disable()
        try:
            self.main_loop()
        finally:
            if was_enabled:
                gc.enable()
            self.shutdown()

    def shutdown(self) -> None:
        linger = 0 if self.force_exit else self.config.linger_ms
        close_all(self.router, self.pub, linger_ms=linger)
        log.info("stopped")

    # --- main loop -------------------------------------------------------------------------

    def main_loop(self) -> None:
        assert self.router is not None
        poller = zmq.Poller()
        poller.register(self.router, zmq.POLLIN)
        period = 1.0 / self.config.telemetry_hz
        spin_ns = self.config.busy_poll_us * 1000
        self._next_tick = time.monotonic() + period
        drained = False
        while not self.should_exit:
            now = time.monotonic()
            # A due tick waits for the next drain (up to one period), so it runs between frames.
            due = self._next_tick if now < self._next_tick else self._next_tick + period
            wait = min(max(due - now, 0.0), _TICK_CAP_S)
            ready = wait_for_input(poller, math.ceil(wait * 1000), spin_ns if drained else 0)
            drained = ready
            if ready:
                self.drain()
            if self._reloading:
                self._finish_reloads()
            now = time.monotonic()
            if now >= self._next_tick and (drained or now >= self._next_tick + period):
                self.tick()
                self._next_tick = max(self._next_tick + period, now)

    def drain(self) -> None:
        """Read every queued message (up to max_drain), then process each stream's newest."""
        assert self.router is not None
        pending: dict[str, _Pending] = {}
        for _ in range(self.config.max_drain):
            try:
                msg = self.router.recv_multipart(zmq.NOBLOCK, copy=False)
            except zmq.Again:
                break
            try:
                self._handle(msg, pending)
            except Exception:  # one message, however odd, must never stop the server
                self.rejected["processing_error"] += 1
                log.exception("a message could not be handled; the server goes on")
        done: list[tuple[StreamState, FrameResult, protocol.MeshFrame]] = []
        for stream, (identity, mesh, t_recv, perf_recv, decode_ns, _keep) in pending.items():
            state = self.streams[stream]
            result = self._process(state, identity, mesh, t_recv, perf_recv, decode_ns)
            if result is not None:
                done.append((state, result, mesh))
        # The fit error runs after every publish of this drain, and only while no input waits,
        # so it never delays a frame; a skipped one is counted. The yield first lets the ZeroMQ
        # I/O thread (runnable on this core since the publish) send the controls out.
        if done and self.config.fit_error != "off":
            os.sched_yield()
        for state, result, mesh in done:
            if state.wants_fit(self.config.fit_error, self.config.fit_error_every):
                t0 = time.perf_counter_ns()
                if t0 < self._next_fit_ns or self._input_waiting():
                    state.telemetry.fit_skipped += 1
                    continue
                try:
                    rms, worst, off = state.fit(result, mesh.vertices)
                except (FloatingPointError, *ORT_ERRORS) as exc:
                    # The frame is already published; only its fit error is lost.
                    state.telemetry.rejected["processing_error"] += 1
                    self.rejected["processing_error"] += 1
                    log.warning("stream %s frame %d: fit error not computed: %s",
                                state.config.stream, result.frame, exc)
                    continue
                self._space_fits(t0, time.perf_counter_ns())
                if off:
                    self._event("off_manifold", state.config.stream,
                                {"frame": result.frame, "rms": rms, "max": worst,
                                 "threshold": state.last_threshold})

    def _space_fits(self, start_ns: int, end_ns: int) -> None:
        """After a fit that took end - start, wait long enough that fits take at most
        fit_error_max_share of the time: gap = took * (1 - share) / share."""
        share = self.config.fit_error_max_share
        self._next_fit_ns = end_ns + int((end_ns - start_ns) * (1.0 - share) / share)

    def _input_waiting(self) -> bool:
        assert self.router is not None
        return bool(int(self.router.getsockopt(zmq.EVENTS)) & zmq.POLLIN)

    def _handle(self, msg: list[zmq.Frame], pending: dict[str, _Pending]) -> None:
        t_recv = time.time_ns()
        perf_recv = time.perf_counter_ns()
        identity = msg[0].bytes
        try:
            header, payload = protocol.decode_request(
                [f.buffer for f in msg[1:]], max_header_bytes=self.config.max_header_bytes)
            kind = header["type"]
            if kind == "mesh":
                self._accept_mesh(identity, header, payload, msg, t_recv, perf_recv, pending)
            elif kind == "schema":
                self._reply_schema(identity, header)
            elif kind == "reload":
                self._start_reload(identity, header)
            else:
                raise protocol.FrameError("unknown_type", f"the server does not accept {kind!r} "
                                          "messages (mesh, schema, reload)",
                                          stream=header.get("stream"))
        except protocol.FrameError as err:
            self._reject(identity, err)

    def _template_for(self, stream: str, frame: int | None) -> StreamState:
        """The stream a new id would copy (accept_any_stream, below max_streams), or
        unknown_stream. Nothing is created here: only a valid mesh frame creates a stream."""
        cfg = self.config
        if cfg.accept_any_stream and len(self.streams) < cfg.max_streams:
            return self.streams[cfg.streams[0].stream]
        known = ", ".join(sorted(self.streams))
        why = (f"the server holds its maximum of {cfg.max_streams} streams"
               if cfg.accept_any_stream else f"configured streams: {known}")
        raise protocol.FrameError("unknown_stream", f"unknown stream {stream!r}; {why}",
                                  stream=stream, frame=frame)

    def _new_stream(self, stream: str, template: StreamState) -> StreamState:
        state = StreamState(replace(template.config, stream=stream), template.model,
                            self.config.window)
        self.streams[stream] = state
        log.info("stream %s: new, serving with the bundle of %s", stream, template.config.stream)
        return state

    def _accept_mesh(self, identity: bytes, header: dict[str, Any], payload: Any,
                     msg: list[zmq.Frame], t_recv: int, perf_recv: int,
                     pending: dict[str, _Pending]) -> None:
        stream = header["stream"]
        known = self.streams.get(stream)
        source = known if known is not None else self._template_for(stream, header.get("frame"))
        t0 = time.perf_counter_ns()
        mesh = protocol.decode_mesh(header, payload, expected_vertices=source.model.vertex_count,
                                    max_bytes=self.config.max_message_bytes)
        decode_ns = time.perf_counter_ns() - t0
        state = known if known is not None else self._new_stream(stream, source)
        tel = state.telemetry
        tel.arrival(t_recv)
        previous = pending.get(stream)
        newest_t = previous[1].t_send_ns if previous else state.last_t_send_ns
        if newest_t is not None and mesh.t_send_ns <= newest_t:
            tel.stale += 1
            return
        if previous is not None:
            tel.dropped += 1
            state.dropped_since_publish += 1
        pending[stream] = (identity, mesh, t_recv, perf_recv, decode_ns, msg)

    def _process(self, state: StreamState, identity: bytes, mesh: protocol.MeshFrame,
                 t_recv: int, perf_recv: int, decode_ns: int) -> FrameResult | None:
        assert self.pub is not None
        pub = self.pub
        try:
            result = state.process(mesh, t_recv, perf_recv, decode_ns, pub.send_multipart)
        except (AlignError, np.linalg.LinAlgError, FilterError, FloatingPointError,
                *ORT_ERRORS) as exc:
            # Finite input the models cannot handle (degenerate stable vertices, values so large
            # the graph overflows): this frame is lost, the stream goes on.
            state.telemetry.rejected["processing_error"] += 1
            self.rejected["processing_error"] += 1
            state.dropped_since_publish += 1  # the next controls carry STALE: a frame is missing
            log.warning("stream %s frame %d: %s", mesh.stream, mesh.frame, exc)
            self._event("processing_error", mesh.stream, {"frame": mesh.frame,
                                                          "message": str(exc)[:200]})
            return None
        state.telemetry.record(result.stage_ns, result.frame)
        state.last_pose = result.pose
        state.telemetry.stabilise_rms = result.stabilise_rms
        return result

    def _reject(self, identity: bytes, err: protocol.FrameError) -> None:
        self.rejected[err.reason] += 1
        state = self.streams.get(err.stream) if err.stream else None
        if state is not None:
            state.telemetry.rejected[err.reason] += 1
        log.debug("rejected (%s): %s", err.reason, err.message)
        self._reply(identity, protocol.encode_frame_error(err))
        self._publish(protocol.encode_reject_event(err))

    def _reply(self, identity: bytes, body: bytes) -> None:
        assert self.router is not None
        try:
            self.router.send_multipart([identity, body], zmq.NOBLOCK)
        except zmq.Again:
            log.debug("reply to a peer with a full queue dropped")

    def _publish(self, frames: list[bytes]) -> None:
        assert self.pub is not None
        self.pub.send_multipart(frames)

    def _event(self, kind: str, stream: str | None, fields: dict[str, Any]) -> None:
        self._publish(protocol.encode_event(kind, stream, fields))

    # --- requests --------------------------------------------------------------------------

    def _reply_schema(self, identity: bytes, header: dict[str, Any]) -> None:
        stream = header["stream"]
        version = protocol.negotiate_version(header["versions"], stream)
        # A new id is answered with what it would get, without creating the stream.
        state = self.streams.get(stream) or self._template_for(stream, None)
        bundle = state.model.bundle
        self._reply(identity, protocol.encode_schema_reply(
            stream, bundle.schema, bundle=state.model.label,
            bundle_version=int(bundle.manifest.get("format_version", 0)),
            fingerprint=bundle.fingerprint, vertices=bundle.vertex_count, version=version))

    def _start_reload(self, identity: bytes, header: dict[str, Any]) -> None:
        stream = header["stream"]
        state = self.streams.get(stream)
        if state is None:
            raise protocol.FrameError("unknown_stream", f"cannot reload stream {stream!r}: the "
                                      f"server holds {sorted(self.streams)}", stream=stream)
        if stream in self._reloading:
            self._reply(identity, protocol.encode_reload_reply(
                stream, False, f"a reload of stream {stream!r} is already in progress"))
            return
        self._reloading.add(stream)
        path = Path(header["bundle"])
        cfg, scfg, old = self.config, state.config, state.model

        def work() -> None:
            try:
                model = load_stream_model(path, threads=cfg.threads,
                                          threshold=scfg.off_manifold_threshold,
                                          factor=cfg.off_manifold_factor)
                check_compatible(old, model)
                self._reloads.put((identity, stream, model))
            except (BundleError, SchemaError, OSError, ValueError, KeyError) as exc:
                self._reloads.put((identity, stream, str(exc)))
            except Exception as exc:  # the worker must always answer
                # Without an answer the stream would refuse every later reload as in progress.
                log.exception("stream %s: reload of %s failed unexpectedly", stream, path)
                self._reloads.put((identity, stream, f"unexpected {type(exc).__name__} while "
                                   f"loading {path}: {exc}"))

        threading.Thread(target=work, name=f"reload-{stream}", daemon=True).start()
        log.info("stream %s: loading %s in the background", stream, path)

    def _finish_reloads(self) -> None:
        while True:
            try:
                identity, stream, outcome = self._reloads.get_nowait()
            except queue.Empty:
                return
            self._reloading.discard(stream)
            state = self.streams[stream]
            if isinstance(outcome, str):
                log.warning("stream %s: reload refused: %s", stream, outcome)
                self._reply(identity, protocol.encode_reload_reply(stream, False, outcome))
                self._event("reload", stream, {"ok": False, "message": outcome})
                continue
            state.swap(outcome)
            state.config = replace(state.config, bundle=Path(outcome.label))
            fingerprint = outcome.bundle.fingerprint
            log.info("stream %s: now serving %s", stream, outcome.label)
            self._reply(identity, protocol.encode_reload_reply(
                stream, True, f"stream {stream!r} now serves {outcome.label}",
                bundle=outcome.label, fingerprint=fingerprint))
            self._event("reload", stream, {"ok": True, "bundle": outcome.label,
                                           "fingerprint": fingerprint})

    # --- telemetry -------------------------------------------------------------------------

    def tick(self) -> None:
        """Telemetry for every stream, then the collector's young generations (a full pass every
        _FULL_GC_EVERY ticks): bounded work, run between frames."""
        self.publish_telemetry()
        self._ticks += 1
        gc.collect(2 if self._ticks % _FULL_GC_EVERY == 0 else 1)

    def publish_telemetry(self) -> None:
        now = time.time_ns()
        server = {"uptime_s": (now - self.t_start_ns) / 1e9, "streams": len(self.streams),
                  "rejected_by_reason": dict(self.rejected),
                  "rejected": sum(self.rejected.values())}
        for stream, state in self.streams.items():
            tel = state.telemetry
            if state.last_pose is not None:
                tel.pose = head_pose(state.last_pose)
            fields = tel.snapshot(now)
            fields["server"] = server
            self._publish(protocol.encode_telemetry(stream, fields))


def wait_for_input(poller: zmq.Poller, timeout_ms: int, spin_ns: int) -> bool:
    """True when the poller's sockets have input; waits up to ``timeout_ms``.

    With ``spin_ns`` > 0 it first polls without blocking for that long, calling sched_yield
    between polls: a spinner that never yields keeps the ZeroMQ I/O thread, which must run to
    deliver the message, off a shared core. Then it blocks in the poller for the rest.
    """
    if spin_ns > 0:
        end = time.perf_counter_ns() + spin_ns
        while True:
            if poller.poll(0):
                return True
            if time.perf_counter_ns() >= end:
                break
            os.sched_yield()
    return bool(poller.poll(timeout_ms))
