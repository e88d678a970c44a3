"""Service metrics (issue 15 point 8): a real server process with ``--metrics-port``, scraped over
HTTP on 127.0.0.1 and parsed with prometheus-client's own parser
(``prometheus_client.parser.text_string_to_metric_families``, the Prometheus text exposition
format); the counters match the server's telemetry of the same quiet moment."""

from __future__ import annotations

import time
import urllib.request
from pathlib import Path
from typing import Any

import numpy as np
import prometheus_client.parser as prometheus_parser
import pytest
from conftest import TINY, Peer, rig_mesh, server_config, server_process, tiny_rig
from rigcast.runtime.messaging import protocol
from rigcast.runtime.serve.config import ConfigError
from rigcast.runtime.serve.telemetry import LATENCY_BUCKETS_S, LatencyHistogram, histogram_naive

pytestmark = pytest.mark.timeout(90)


def scrape(url: str) -> dict[str, list[Any]]:
    """{family name: its samples} of one scrape."""
    with urllib.request.urlopen(url, timeout=5) as reply:  # 127.0.0.1 only
        text = reply.read().decode("utf-8")
    return {f.name: list(f.samples) for f in prometheus_parser.text_string_to_metric_families(text)}


def sample(families: dict[str, list[Any]], family: str, name: str, **labels: str) -> float:
    found = [s.value for s in families[family] if s.name == name and s.labels == labels]
    assert len(found) == 1, f"{name}{labels}: {len(found)} samples"
    return float(found[0])


def settled_telemetry(peer: Peer, stream: str, sent: int, rejected: int) -> dict[str, Any]:
    """The stream's telemetry once every frame sent is accounted for (processed + dropped +
    stale) and every reject counted, then one more message (nothing moves any more)."""
    topic = protocol.TOPIC_TELEMETRY + stream.encode()
    deadline = time.monotonic() + 20
    settled = 0
    while time.monotonic() < deadline:
        frames = peer.recv_pub(0.5)
        if frames is None or frames[0] != topic:
            continue
        t = protocol.decode_header(frames[1])
        if t["processed"] + t["dropped"] + t["stale"] == sent and t["rejected"] == rejected:
            settled += 1
            if settled == 2:
                return t
    raise TimeoutError(f"telemetry of {stream} never accounted for {sent} frames")


def test_scraped_counters_match_the_servers_telemetry(tiny_bundle: Path, tmp_path: Path) -> None:
    rig = tiny_rig(TINY)
    rng = np.random.default_rng(8)
    args = ["--bundle", f"tiny={tiny_bundle}", "--metrics-port", "0", "--telemetry-hz", "20"]
    with server_process(args, tmp_path) as (_, ready):
        assert ready["metrics"].startswith("http://127.0.0.1:")
        peer = Peer(ready["input"], ready["output"])
        try:
            peer.handshake()
            t0 = time.time_ns()
            valid = 40
            for i in range(valid):  # a burst: some are superseded in one drain (dropped)
                mesh = rig_mesh(rig, rng.uniform(0, 1, TINY["controls"]))
                peer.dealer.send_multipart(protocol.encode_mesh("tiny", i, t0 + i * 8_000_000,
                                                                mesh))
            time.sleep(0.3)
            mesh = rig_mesh(rig, np.zeros(TINY["controls"]))
            peer.dealer.send_multipart(protocol.encode_mesh("tiny", 99, t0, mesh))  # stale
            bad = np.zeros((TINY["vertices"] - 1, 3), np.float32)
            peer.dealer.send_multipart(protocol.encode_mesh("tiny", 100, t0 + 10**9, bad))
            nan = mesh.copy()
            nan[3, 1] = np.nan
            peer.dealer.send_multipart(protocol.encode_mesh("tiny", 101, t0 + 10**9, nan))
            peer.dealer.send_multipart(protocol.encode_mesh("ghost", 0, t0, mesh))
            tel = settled_telemetry(peer, "tiny", valid + 1, rejected=2)
            got = scrape(ready["metrics"])
        finally:
            peer.close()
    assert tel["stale"] == 1
    for family, key in (("rigcast_frames_processed", "processed"),
                        ("rigcast_frames_dropped", "dropped"), ("rigcast_frames_stale", "stale"),
                        ("rigcast_frames_clamped", "clamped")):
        assert sample(got, family, family + "_total", stream="tiny") == tel[key], family
    assert tel["rejected_by_reason"] == {"bad_vertex_count": 1, "non_finite": 1}
    for reason, count in tel["rejected_by_reason"].items():
        assert sample(got, "rigcast_frames_rejected", "rigcast_frames_rejected_total",
                      stream="tiny", reason=reason) == count
    server_wide = tel["server"]["rejected_by_reason"]
    assert server_wide["unknown_stream"] == 1
    for reason, count in server_wide.items():
        assert sample(got, "rigcast_server_rejected", "rigcast_server_rejected_total",
                      reason=reason) == count
    # The latency histogram, in seconds: one observation per published frame, and the
    # telemetry's median lies where the buckets say half the frames are.
    hist = "rigcast_frame_latency_seconds"
    n = tel["processed"]
    assert sample(got, hist, hist + "_count", stream="tiny", stage="total") == n
    buckets = {float(s.labels["le"]): s.value for s in got[hist]
               if s.name == hist + "_bucket" and s.labels["stage"] == "total"}
    p50_s = tel["latency"]["total"]["p50_ms"] / 1e3
    above = min(b for b in buckets if b >= p50_s)
    below = [b for b in buckets if b < p50_s]
    assert buckets[above] >= n / 2
    assert not below or buckets[max(below)] <= n / 2
    total_s = sample(got, hist, hist + "_sum", stream="tiny", stage="total")
    assert 0 < total_s < n * 1.0  # seconds, not ms or ns


def test_histogram_counts_match_the_naive_twin() -> None:
    rng = np.random.default_rng(2)
    values = np.concatenate([rng.integers(0, 2_000_000_000, 500),
                             np.round(np.array(LATENCY_BUCKETS_S) * 1e9).astype(np.int64)])
    hist = LatencyHistogram()
    for v in values:
        hist.observe(int(v))
    buckets, total_s = hist.cumulative()
    assert [c for _, c in buckets] == histogram_naive(values.tolist(), LATENCY_BUCKETS_S)
    assert buckets[-1] == ("+Inf", float(values.shape[0]))
    assert total_s == pytest.approx(values.sum() / 1e9)


def test_a_non_loopback_metrics_endpoint_needs_both_flags(tiny_bundle: Path) -> None:
    base = {"metrics_port": 9100, "metrics_host": "0.0.0.0"}
    with pytest.raises(ConfigError, match="allow_remote"):
        server_config({"a": tiny_bundle}, **base)
    with pytest.raises(ConfigError, match="insecure-no-auth"):
        server_config({"a": tiny_bundle}, **base, allow_remote=True)
    cfg = server_config({"a": tiny_bundle}, **base, allow_remote=True, insecure_no_auth=True)
    assert cfg.metrics_host == "0.0.0.0"
    assert server_config({"a": tiny_bundle}, metrics_port=0).metrics_host == "127.0.0.1"
    with pytest.raises(ConfigError, match="metrics_port"):
        server_config({"a": tiny_bundle}, metrics_port=70000)
