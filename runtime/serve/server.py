"""The live server: mesh frames in on a ROUTER, controls, telemetry and events out on a PUB.

One thread, one poller, a small loop: startup (load and check every bundle, open the sessions,
bind), the main loop (wait, drain the queued messages, keep the newest mesh per stream, process
each stream's newest frame, then the pending fit errors), a periodic telemetry tick, and
shutdown (driven by a flag that SIGINT/SIGTERM set; a second signal forces the exit).

Load policy (docs/protocol.md §4): a drain reads at most ``max_drain`` messages; every message
is decoded and validated; a valid mesh superseded by a newer one of its stream is *dropped*, one
not newer than the stream's last is *stale*; a bad message gets an error reply, an ``evt`` event
and a count by reason. Nothing is dropped silently; the next frame after drops carries STALE.

Off the frame's path: fit errors run between drains while no input waits, the streams in turn,
each within ``fit_error_max_share`` (runtime/trust/fairness.py). Telemetry ticks and the garbage
collector's passes run right after a drain, or on a timer when no frames come. ``busy_poll_us``
> 0 polls the input without sleeping (yielding the CPU) that long after each drain.

Reload: a ``reload`` request is loaded and checked on a background thread (runtime/trust/reload.py,
which also decides what may be opened) while frames flow; the model is swapped between frames,
keeping the filter state. Another vertex count or control schema is refused (ok=false). Trust:
security.py, limits.py, ownership.py. Optional: meshes on msh.<stream> (``publish_meshes``),
Prometheus metrics (service_metrics.py).
"""

from __future__ import annotations

import gc
import logging
import math
import os
import signal
import threading
import time
from collections import Counter
from dataclasses import replace
from types import FrameType
from typing import Any

import numpy as np
import zmq
from rigcast.runtime.messaging import protocol, sockets
from rigcast.runtime.messaging.messages import (
    OffManifoldEvent,
    ProcessingErrorEvent,
    ReloadReply,
    SchemaReply,
)
from rigcast.runtime.messaging.sockets import bind_pub, bind_router, bound_endpoint, close_all
from rigcast.runtime.serve.config import ServerConfig
from rigcast.runtime.serve.serve_streams import open_streams
from rigcast.runtime.serve.service_metrics import MetricsEndpoint, ServerView, start_metrics
from rigcast.runtime.serve.telemetry import heartbeat, telemetry
from rigcast.runtime.solve.align import AlignError
from rigcast.runtime.solve.inference import ORT_ERRORS
from rigcast.runtime.solve.one_euro import FilterError
from rigcast.runtime.solve.pipeline import (
    FrameResult,
    PendingFrame,
    StreamState,
)
from rigcast.runtime.trust.fairness import FitScheduler
from rigcast.runtime.trust.limits import Incoming, RateLimitedLog, ReadLimits, read_message, user_id
from rigcast.runtime.trust.ownership import StreamGuard, peer_of, session_of
from rigcast.runtime.trust.reload import Reloader, redact
from rigcast.runtime.trust.security import ServerSecurity

log = logging.getLogger(__name__)

_TICK_CAP_S = 0.05  # the loop wakes at least this often to see stop flags and reload results
_FULL_GC_EVERY = 100  # ticks between full collections (10 s at the default 10 Hz)
HEARTBEAT_S = 0.5  # a heartbeat on the telemetry topic this often (docs/protocol.md §5.4)
_IDLE_CHECK_S = 1.0  # how often idle streams are looked for


class Server:
    """Holds the running state. ``run()`` blocks until ``request_stop()`` or a signal."""

    def __init__(self, config: ServerConfig, ctx: zmq.Context | None = None) -> None:
        self.config = config
        self.ctx = ctx or zmq.Context.instance()
        self.streams: dict[str, StreamState] = {}
        self.router: zmq.Socket | None = None
        self.pub: zmq.Socket | None = None
        self.security: ServerSecurity | None = None
        self.input_endpoint = ""
        self.output_endpoint = ""
        self.should_exit = False
        self.force_exit = False
        self.started = threading.Event()
        self.rejected: Counter[str] = Counter()
        self.t_start_ns = time.time_ns()
        self.reloader = Reloader(config)
        self.guard = StreamGuard(owner_timeout_s=config.owner_timeout_s,
                                 max_clock_step_s=config.max_clock_step_s)
        self.fits = FitScheduler(config.fit_error_max_share)
        self.limits = ReadLimits(config.max_header_bytes, config.max_message_bytes)
        self._log = RateLimitedLog(log)
        self._next_tick = 0.0
        self._next_heartbeat = 0.0
        self._next_idle_check = 0.0
        self._ticks = 0
        self.metrics: MetricsEndpoint | None = None  # serve --metrics-port

    # --- lifecycle -------------------------------------------------------------------------

    def startup(self) -> None:
        """Load every bundle (each distinct path once), open sessions, bind. Raises BundleError,
        sockets.BindError, keys.KeyFileError."""
        cfg = self.config
        self.streams = open_streams(cfg)
        self.security = security = ServerSecurity(self.ctx, cfg)
        try:
            self.router = bind_router(self.ctx, cfg.input, rcvhwm=cfg.input_hwm,
                                      sndhwm=cfg.output_hwm, linger_ms=cfg.linger_ms,
                                      max_message_bytes=cfg.max_message_bytes,
                                      prepare=security.prepare)
            self.pub = bind_pub(self.ctx, cfg.output, sndhwm=cfg.output_hwm,
                                linger_ms=cfg.linger_ms, prepare=security.prepare)
            if cfg.metrics_port is not None:  # MetricsError is an OSError too
                self.metrics = start_metrics(self._metrics_view(), cfg.metrics_host,
                                             cfg.metrics_port, remote=cfg.allow_remote)
        except OSError:
            close_all(self.router, self.pub, linger_ms=0)
            security.stop()
            raise
        security.watch(self.router, self.pub)
        self.input_endpoint = bound_endpoint(self.router)
        self.output_endpoint = bound_endpoint(self.pub)
        log.info("serving: mesh frames in on %s, controls out on %s (%s)", self.input_endpoint,
                 self.output_endpoint, "CURVE" if security.curve else "no authentication")
        self.started.set()

    def _metrics_view(self) -> ServerView:
        return ServerView(streams=lambda: [s.telemetry for s in list(self.streams.values())],
                          rejected=lambda: dict(self.rejected),
                          uptime_s=lambda: (time.time_ns() - self.t_start_ns) / 1e9)

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
        if self.security is not None:
            self.security.stop(self.router, self.pub)
        close_all(self.router, self.pub, linger_ms=linger)
        if self.metrics is not None:
            self.metrics.stop()
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
            wait = min(max(due - now, 0.0), _TICK_CAP_S, self.fits.due_in_s())
            ready = sockets.wait_for_input(poller, math.ceil(wait * 1000), spin_ns if drained else 0)
            drained = ready
            if ready:
                self.drain()
            self.run_fits()
            if self.reloader.busy:
                self._finish_reloads()
            now = time.monotonic()
            if now >= self._next_tick and (drained or now >= self._next_tick + period):
                self.tick()
                self._next_tick = max(self._next_tick + period, now)
            if now >= self._next_heartbeat:
                self.publish_heartbeat()
                self._next_heartbeat = now + HEARTBEAT_S

    def drain(self) -> None:
        """Read every queued message (up to max_drain), then process each stream's newest."""
        assert self.router is not None
        pending: dict[str, PendingFrame] = {}
        for _ in range(self.config.max_drain):
            try:
                msg = read_message(self.router, self.limits)
            except zmq.Again:
                break
            try:
                self._handle(msg, pending)
            except Exception:  # one message, however odd, must never stop the server
                self.rejected["processing_error"] += 1
                self._log("processing_error", logging.ERROR, "a message could not be handled; "
                          "the server goes on", exc_info=True)
        fitting = self.config.fit_error_schedule != "off"
        for stream, p in pending.items():
            state = self.streams[stream]
            result = self._process(state, p)
            if (result is not None and fitting
                    and state.wants_fit(self.config.fit_error_schedule,
                                        self.config.fit_error_every)
                    and self.fits.offer(stream, (state, result, p)) is not None):
                state.telemetry.fit_skipped += 1
        # The fit error runs after every publish of this drain, and only while no input waits,
        # so it never delays a frame. The yield first lets the ZeroMQ I/O thread (runnable on
        # this core since the publish) send the controls out.
        if pending and fitting:
            os.sched_yield()

    def run_fits(self) -> None:
        """Pending fit errors, the streams in turn, each within its time share."""
        self.fits.run(self._input_waiting, self._fit)

    def _fit(self, stream: str, item: tuple[StreamState, FrameResult, PendingFrame]) -> None:
        held, result, pending = item
        state = self.streams.get(stream)
        if state is None or state is not held:
            return  # the stream expired meanwhile
        try:
            rms, worst, off = state.fit(result, pending.mesh.vertices)
        except (FloatingPointError, *ORT_ERRORS) as exc:
            # The frame is already published and counted; only its fit error is lost, which
            # telemetry counts as a skipped fit (a rejection would count the frame twice).
            state.telemetry.fit_skipped += 1
            self._log(f"fit:{stream}", logging.WARNING, "stream %s frame %d: fit error not "
                      "computed: %s", stream, result.frame, exc)
            return
        if off:
            self._publish(OffManifoldEvent(stream, result.frame, rms, worst, state.last_threshold,
                                           state.telemetry.threshold_on).encode())

    def _input_waiting(self) -> bool:
        assert self.router is not None
        return bool(int(self.router.getsockopt(zmq.EVENTS)) & zmq.POLLIN)

    def _handle(self, msg: Incoming, pending: dict[str, PendingFrame]) -> None:
        t_recv = time.time_ns()
        perf_recv = time.perf_counter_ns()
        identity = msg.identity
        try:
            if msg.refusal is not None:
                raise msg.refusal
            header, payload = protocol.decode_request(
                [f.buffer for f in msg.parts], max_header_bytes=self.config.max_header_bytes)
            kind = header["type"]
            if kind == "mesh":
                peer = peer_of(identity, user_id(msg.first), self.security is not None
                               and self.security.curve)
                self._accept_mesh(identity, peer, header, payload, msg.parts, t_recv, perf_recv,
                                  pending)
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
        why = (f"the server holds its maximum of {cfg.max_streams} streams"
               if cfg.accept_any_stream else "the server does not serve it")
        raise protocol.FrameError("unknown_stream", f"unknown stream {stream!r}; {why}",
                                  stream=stream, frame=frame)

    def _new_stream(self, stream: str, template: StreamState) -> StreamState:
        state = StreamState(replace(template.config, stream=stream), template.model,
                            self.config.window)
        self.streams[stream] = state
        self._log("new-stream", logging.INFO, "stream %s: new, serving with the bundle of %s",
                  stream, template.config.stream)
        return state

    def _accept_mesh(self, identity: bytes, peer: str, header: dict[str, Any], payload: Any,
                     msg: list[zmq.Frame], t_recv: int, perf_recv: int,
                     pending: dict[str, PendingFrame]) -> None:
        stream = header["stream"]
        session = session_of(header)
        known = self.streams.get(stream)
        source = known if known is not None else self._template_for(stream, header.get("frame"))
        t0 = time.perf_counter_ns()
        mesh = protocol.decode_mesh(header, payload, expected_vertices=source.model.vertex_count,
                                    max_bytes=self.config.max_message_bytes)
        decode_ns = time.perf_counter_ns() - t0
        now = time.monotonic()
        restarted = self.guard.admit(stream, mesh.frame, peer, session, mesh.t_send_ns, t_recv,
                                     now)
        state = known if known is not None else self._new_stream(stream, source)
        tel = state.telemetry
        tel.arrival(t_recv)
        previous = pending.get(stream)
        if restarted:  # a new sender or session: its clock starts afresh (docs/protocol.md §4)
            state.last_t_send_ns = None
            state.restart_filter()
            previous = None
        newest_t = previous.mesh.t_send_ns if previous else state.last_t_send_ns
        if newest_t is not None and mesh.t_send_ns <= newest_t:
            tel.stale += 1
            return
        if stream in pending:
            tel.dropped += 1
            state.dropped_since_publish += 1
        pending[stream] = PendingFrame(identity, mesh, t_recv, perf_recv, decode_ns, msg)

    def _process(self, state: StreamState, p: PendingFrame) -> FrameResult | None:
        assert self.pub is not None
        mesh = p.mesh
        try:
            result = state.process(mesh, p.t_recv_ns, p.perf_recv_ns, p.decode_ns,
                                   self.pub.send_multipart)
        except (AlignError, np.linalg.LinAlgError, FilterError, FloatingPointError,
                *ORT_ERRORS) as exc:
            # Finite input the models cannot handle (degenerate stable vertices, values so large
            # the graph overflows): this frame is lost, the stream goes on.
            state.telemetry.rejected["processing_error"] += 1
            self.rejected["processing_error"] += 1
            state.dropped_since_publish += 1  # the next controls carry STALE: a frame is missing
            self._log(f"processing:{mesh.stream}", logging.WARNING, "stream %s frame %d: %s",
                      mesh.stream, mesh.frame, exc)
            self._publish(ProcessingErrorEvent(mesh.stream, mesh.frame,
                                               redact(str(exc))[:200]).encode())
            return None
        state.telemetry.record(result.stage_ns, result.frame)
        state.telemetry.pose = result.head_pose
        state.telemetry.stabilise_rms = result.stabilise_rms
        if self.config.publish_meshes != "off":  # after the controls, without a copy
            self.pub.send_multipart(state.published_mesh(mesh, result, self.config.publish_meshes),
                                    copy=False)
        return result

    def _reject(self, identity: bytes, err: protocol.FrameError) -> None:
        self.rejected[err.reason] += 1
        state = self.streams.get(err.stream) if err.stream else None
        if state is not None:
            state.telemetry.rejected[err.reason] += 1
        self._log(f"reject:{err.reason}", logging.INFO, "rejected (%s): %s", err.reason,
                  err.message[:300])
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
        self._reply(identity, SchemaReply(
            stream, bundle.schema, bundle=state.model.label,
            bundle_version=int(bundle.manifest.get("format_version", 0)),
            fingerprint=bundle.fingerprint, vertices=bundle.vertex_count,
            version=version).encode())

    def _start_reload(self, identity: bytes, header: dict[str, Any]) -> None:
        stream = header["stream"]
        state = self.streams.get(stream)
        if state is None:
            raise protocol.FrameError("unknown_stream", f"cannot reload stream {stream!r}: the "
                                      "server does not hold it", stream=stream)
        refusal = self.reloader.start(identity, stream, header["bundle"], state.model,
                                      state.config.off_manifold_threshold)
        if refusal is not None:  # answered to the asker only: no event for every subscriber
            self._reply(identity, ReloadReply(stream, False, refusal).encode())

    def _finish_reloads(self) -> None:
        self.reloader.finish(self.streams, self._reply, self._event)

    # --- telemetry -------------------------------------------------------------------------

    def tick(self) -> None:
        """Telemetry for every stream, idle streams expired, then the collector's young
        generations (a full pass every _FULL_GC_EVERY ticks): bounded work, between frames."""
        self.publish_telemetry()
        now = time.monotonic()
        if now >= self._next_idle_check:
            self._next_idle_check = now + _IDLE_CHECK_S
            self.expire_idle(now)
        self._ticks += 1
        gc.collect(2 if self._ticks % _FULL_GC_EVERY == 0 else 1)

    def expire_idle(self, now: float) -> None:
        """Remove streams made by accept_any_stream that had no frame for stream_idle_s."""
        configured = {s.stream for s in self.config.streams}
        for stream in self.guard.expire(now, self.config.stream_idle_s):
            if stream not in configured and stream not in self.reloader.busy:
                self.streams.pop(stream, None)
                self.fits.forget(stream)
                log.info("stream %s: removed after %.0f s without frames", stream,
                         self.config.stream_idle_s)

    def publish_telemetry(self) -> None:
        for message in telemetry([s.telemetry for s in self.streams.values()], self.t_start_ns,
                                 self.rejected):
            self._publish(message.encode())

    def publish_heartbeat(self) -> None:
        """The server is alive: a heartbeat on the telemetry topic."""
        self._publish(heartbeat(list(self.streams), self.t_start_ns, HEARTBEAT_S).encode())
