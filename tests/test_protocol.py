"""Wire protocol: round trips, every rejection reason, fuzzing, zero copy, documented bytes."""

from __future__ import annotations

import re
from pathlib import Path

import msgpack
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from rigcast.runtime.messaging import protocol as P
from rigcast.runtime.schema import Control, ControlSchema

DOC = Path(__file__).resolve().parents[1] / "docs" / "protocol.md"

streams = st.text(min_size=1, max_size=40)  # at most 160 UTF-8 bytes, under the 255 limit
u64 = st.integers(min_value=0, max_value=2**64 - 1)
i64 = st.integers(min_value=-(2**63), max_value=2**63 - 1)
finite32 = st.floats(allow_nan=False, allow_infinity=False, width=32)


def _decode(frames: list, expected: int | None = None, max_bytes: int = 1 << 20) -> P.MeshFrame:
    header, payload = P.decode_request(frames)
    return P.decode_mesh(header, payload, expected_vertices=expected, max_bytes=max_bytes)


def _mesh(v: int = 4, seed: int = 0) -> np.ndarray:
    return np.random.default_rng(seed).normal(size=(v, 3)).astype(np.float32)


@settings(max_examples=80, deadline=None)
@given(stream=streams, frame=u64, t=i64, data=st.lists(finite32, min_size=0, max_size=30))
def test_mesh_round_trip(stream: str, frame: int, t: int, data: list[float]) -> None:
    n = len(data) // 3
    verts = np.array(data[: n * 3], dtype=np.float32).reshape(n, 3)
    frames = [bytes(f) for f in P.encode_mesh(stream, frame, t, verts)]
    mesh = _decode(frames, expected=n)
    assert (mesh.stream, mesh.frame, mesh.t_send_ns) == (stream, frame, t)
    np.testing.assert_array_equal(mesh.vertices, verts)
    assert mesh.vertices.dtype == np.float32 and not mesh.vertices.flags.writeable


def test_decode_is_zero_copy_and_encode_too() -> None:
    verts = _mesh(100)
    frames = P.encode_mesh("a", 1, 2, verts)
    assert np.shares_memory(np.frombuffer(frames[1], dtype=np.uint8), verts)
    payload = bytearray(frames[1])
    mesh = _decode([frames[0], payload])
    assert np.shares_memory(mesh.vertices, np.frombuffer(payload, dtype=np.uint8))
    # A non-contiguous or float64 input is converted once, and still round-trips.
    wide = np.asfortranarray(verts.astype(np.float64))
    np.testing.assert_array_equal(_decode(P.encode_mesh("a", 1, 2, wide)).vertices, verts)


@settings(max_examples=50, deadline=None)
@given(stream=streams, frame=u64, ts=st.tuples(i64, i64, i64), flags=st.integers(0, 15),
       values=st.lists(finite32, min_size=1, max_size=20))
def test_controls_round_trip(stream: str, frame: int, ts: tuple[int, int, int], flags: int,
                             values: list[float]) -> None:
    vals = np.array(values, dtype=np.float32)
    msg = P.decode_controls(P.encode_controls(stream, frame, *ts, vals, flags))
    assert (msg.stream, msg.frame, (msg.t_send_ns, msg.t_recv_ns, msg.t_pub_ns), msg.flags) == (
        stream, frame, ts, flags)
    np.testing.assert_array_equal(msg.values, vals)
    assert msg.has(P.FLAG_STALE) == bool(flags & 8)
    again = P.decode_published(P.encode_controls(stream, frame, *ts, vals, flags))
    assert isinstance(again, P.ControlsMessage) and again.frame == frame
    np.testing.assert_array_equal(again.values, vals)


def test_flag_bits_and_names() -> None:
    assert (P.FLAG_FILTERED, P.FLAG_CLAMPED, P.FLAG_OFF_MANIFOLD, P.FLAG_STALE) == (1, 2, 4, 8)
    assert P.flag_names(P.FLAG_FILTERED | P.FLAG_STALE) == ("filtered", "stale")


def test_controls_topic_must_match_exactly() -> None:
    frames = P.encode_controls("tamsin", 1, 0, 0, 0, np.zeros(2, np.float32), 0)
    frames[0] = b"ctl.tamsin2"
    with pytest.raises(P.FrameError, match="does not match") as info:
        P.decode_controls(frames)
    assert info.value.reason == "malformed"
    frames = P.encode_controls("tamsin", 1, 0, 0, 0, np.zeros(2, np.float32), 0)
    with pytest.raises(P.FrameError, match="count 2 needs 8"):
        P.decode_controls([frames[0], frames[1], b"\0" * 4])


def test_schema_request_reply_and_negotiation() -> None:
    schema = ControlSchema((Control("jaw_open", 0.0, 1.0, 0.0, group="jaw"),
                            Control("brow_up_l", -1.0, 1.0, 0.0, group="brow", pair="brow_up_r"),
                            Control("brow_up_r", -1.0, 1.0, 0.0, group="brow", pair="brow_up_l")))
    req = P.decode_header(P.encode_schema_request("tamsin", [1, 7]))
    assert req["type"] == "schema" and req["versions"] == [1, 7]
    assert P.negotiate_version(req["versions"]) == 1
    with pytest.raises(P.FrameError, match=r"\[2, 3\]") as info:
        P.negotiate_version([2, 3], "tamsin")
    assert info.value.reason == "unsupported_version" and info.value.stream == "tamsin"
    raw = P.encode_schema_reply("tamsin", schema, bundle="tamsin.rcb", bundle_version=1,
                                fingerprint="abc123", vertices=500)
    reply = P.decode_reply(raw)
    assert reply["protocol_versions"] == [1] and reply["vertices"] == 500
    assert reply["fingerprint"] == "abc123" and reply["bundle_version"] == 1
    assert P.schema_from_reply(reply) == schema


def test_client_reads_schema_replies_larger_than_the_request_cap() -> None:
    """A schema reply grows with the control count (the 46-control demo face gives about 4.3 kB);
    the request cap (4,096 bytes) binds what the server reads, not what clients read."""
    schema = ControlSchema(tuple(Control(f"ctl_{i:03d}_long_descriptive_name", -1.0, 1.0, 0.0,
                                         group=f"group_{i // 4}") for i in range(120)))
    raw = P.encode_schema_reply("tamsin", schema, bundle="/bundles/tamsin.rcb", bundle_version=1,
                                fingerprint="0123456789abcdef", vertices=20_000)
    assert len(raw) > P.MAX_HEADER_BYTES
    with pytest.raises(P.FrameError) as info:
        P.decode_header(raw)
    assert info.value.reason == "oversize"
    assert P.schema_from_reply(P.decode_reply(raw)) == schema


def test_reload_error_telemetry_event_round_trips() -> None:
    req = P.decode_header(P.encode_reload_request("tamsin", "/tmp/new.rcb"))
    assert (req["type"], req["bundle"]) == ("reload", "/tmp/new.rcb")
    rep = P.decode_reply(P.encode_reload_reply("tamsin", False, "no such file", bundle="x"))
    assert (rep["ok"], rep["message"], rep["bundle"]) == (False, "no such file", "x")
    for reason in P.REASONS:
        err = P.decode_reply(P.encode_error(reason, "why", "s", 3))
        got = (err["reason"], err["stream"], err["frame"], err["versions"])
        assert got == (reason, "s", 3, [1])
    with pytest.raises(ValueError, match="bogus"):
        P.encode_error("bogus", "x")
    topic, body = P.encode_telemetry("tamsin", {"p50_ms": np.float32(0.5), "n": np.int64(3),
                                                "hist": np.arange(3)})
    assert topic == b"tel.tamsin"
    tel = P.decode_published([topic, body])
    assert isinstance(tel, dict)
    assert (tel["type"], tel["p50_ms"], tel["n"], tel["hist"]) == ("telemetry", 0.5, 3, [0, 1, 2])
    with pytest.raises(ValueError, match="type"):
        P.encode_telemetry("tamsin", {"type": "x"})
    err = P.FrameError("non_finite", "NaN at vertex 3", stream="tamsin", frame=9)
    topic, body = P.encode_reject_event(err)
    evt = P.decode_published([topic, body])
    assert topic == b"evt"
    assert isinstance(evt, dict)
    assert (evt["kind"], evt["reason"], evt["frame"], evt["stream"]) == (
        "reject", "non_finite", 9, "tamsin")


# --- every rejection reason -------------------------------------------------------------------

def _header(**changes: object) -> bytes:
    h: dict[str, object] = {"v": 1, "type": "mesh", "stream": "s", "frame": 1, "t_send_ns": 5,
                            "vertices": 4}
    h.update(changes)
    return msgpack.packb({k: v for k, v in h.items() if v is not ...})


def _reason(frames: list, expected: int | None = 4, max_bytes: int = 1 << 20) -> P.FrameError:
    with pytest.raises(P.FrameError) as info:
        _decode(frames, expected, max_bytes)
    assert info.value.reason in P.REASONS
    return info.value


def test_bad_vertex_count() -> None:
    frames = P.encode_mesh("s", 3, 0, _mesh(5))
    err = _reason(frames, expected=4)
    assert err.reason == "bad_vertex_count" and "expects 4" in str(err) and "has 5" in str(err)
    assert (err.stream, err.frame) == ("s", 3)


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_non_finite(bad: float) -> None:
    verts = _mesh(4)
    verts[2, 1] = bad
    err = _reason(P.encode_mesh("s", 3, 0, verts))
    assert err.reason == "non_finite" and "vertex 2" in str(err)


def test_huge_finite_values_are_accepted() -> None:
    verts = np.full((4, 3), np.finfo(np.float32).max, dtype=np.float32)
    np.testing.assert_array_equal(_decode(P.encode_mesh("s", 3, 0, verts), 4).vertices, verts)


def test_unknown_version_and_type() -> None:
    payload = _mesh(4).tobytes()
    err = _reason([_header(v=2), payload])
    assert err.reason == "unknown_version" and "2" in str(err) and err.stream == "s"
    err = _reason([_header(type="dance"), payload])
    assert err.reason == "unknown_type" and "dance" in str(err)


def test_oversize() -> None:
    frames = P.encode_mesh("s", 1, 0, _mesh(4))
    assert _reason(frames, max_bytes=47).reason == "oversize"
    # A header that declares a huge mesh is oversize before any length check.
    assert _reason([_header(vertices=10**9), b""], expected=None).reason == "oversize"
    with pytest.raises(P.FrameError) as info:
        P.decode_header(b"\x80" * 5000)
    assert info.value.reason == "oversize"


@pytest.mark.parametrize(
    ("frames", "needle"),
    [
        ([b"\x86\xa1v"], "not valid msgpack"),  # truncated
        ([msgpack.packb([1, 2]), b""], "must be a msgpack map"),
        ([_header(frame=...), b"\0" * 48], "missing 'frame'"),
        ([_header(frame=-1), b"\0" * 48], "'frame'"),
        ([_header(stream=""), b"\0" * 48], "'stream'"),
        ([_header(t_send_ns="now"), b"\0" * 48], "'t_send_ns'"),
        ([_header(v="1"), b"\0" * 48], "'v' must be an int"),
        ([_header(v=True), b"\0" * 48], "'v' must be an int"),
        ([_header(type=3), b"\0" * 48], "'type' must be a str"),
        ([_header(), b"\0" * 47], "47 bytes, 4 vertices need 48"),
        ([_header()], "1 frames"),
        ([_header(), b"\0" * 48, b""], "1 or 2 frames"),
        ([P.encode_schema_request("s"), b"\0"], "2 frames"),
    ],
)
def test_malformed(frames: list, needle: str) -> None:
    err = _reason(frames)
    assert err.reason == "malformed"
    assert needle in str(err)


@settings(max_examples=400, deadline=None)
@given(raw=st.binary(max_size=200))
def test_fuzz_random_bytes_only_raise_frame_error(raw: bytes) -> None:
    try:
        header = P.decode_header(raw)
    except P.FrameError as err:
        assert err.reason in P.REASONS
    else:
        assert header["type"] in P.MESSAGE_TYPES


@settings(max_examples=400, deadline=None)
@given(data=st.data())
def test_fuzz_mutated_headers_only_raise_frame_error(data: st.DataObject) -> None:
    good = bytearray(P.encode_mesh("tamsin", 7, 1700000000000000000, _mesh(2))[0])
    for _ in range(data.draw(st.integers(1, 4))):
        op = data.draw(st.sampled_from(["flip", "cut", "insert"]))
        i = data.draw(st.integers(0, max(len(good) - 1, 0)))
        if op == "flip" and good:
            good[i] = data.draw(st.integers(0, 255))
        elif op == "cut":
            del good[i:]
        else:
            good[i:i] = data.draw(st.binary(min_size=1, max_size=8))
    payload = data.draw(st.sampled_from([b"", b"\0" * 24, b"\xff" * 24]))
    try:
        mesh = _decode([bytes(good), payload], expected=2)
    except P.FrameError as err:
        assert err.reason in P.REASONS
    else:
        assert mesh.vertices.shape == (2, 3) and np.isfinite(mesh.vertices).all()


def test_frame_error_rejects_unknown_reason() -> None:
    with pytest.raises(ValueError, match="nope"):
        P.FrameError("nope", "x")


# --- the worked example in docs/protocol.md ---------------------------------------------------

EXAMPLE_VERTICES = np.array([[0.0, 1.5, -2.0], [0.25, 0.5, 1.0]], dtype=np.float32)
EXAMPLE_CONTROLS = np.array([0.5, 0.0, 1.0], dtype=np.float32)


def _example_frames() -> dict[str, bytes]:
    mesh = P.encode_mesh("tamsin", 7, 1700000000000000000, EXAMPLE_VERTICES)
    ctl = P.encode_controls("tamsin", 7, 1700000000000000000, 1700000000000250000,
                            1700000000000730000, EXAMPLE_CONTROLS,
                            P.FLAG_FILTERED | P.FLAG_CLAMPED)
    return {"mesh-header": bytes(mesh[0]), "mesh-payload": bytes(mesh[1]),
            "controls-topic": ctl[0], "controls-header": ctl[1], "controls-payload": ctl[2]}


def test_documented_example_bytes_match_the_encoder() -> None:
    text = DOC.read_text(encoding="utf-8")
    for name, raw in _example_frames().items():
        block = re.search(rf"<!-- example:{name} -->\s*```text\n(.*?)```", text, re.S)
        assert block is not None, f"docs/protocol.md has no example block {name!r}"
        documented = bytes.fromhex(re.sub(r"\s+", "", block.group(1)))
        assert documented == raw, f"docs/protocol.md example {name!r} is out of date"
