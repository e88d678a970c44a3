"""rigcast.runtime.serve: the live server: its loop, its streams, its settings and what it reports.

Modules: server, serve_main, serve_streams, config, config_checks, telemetry, service_metrics,
bundle_quality.
"""
