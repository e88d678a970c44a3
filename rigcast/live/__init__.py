"""rigcast.live: the live tools around a running server.

Modules: connect, send, record, recording_out, watch, watch_state, watch_view, serve_status,
osc_out, latency_check, latency_probe, keys.
"""
