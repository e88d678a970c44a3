"""The pieces behind the server's trust rules, each on its own: the ONNX external-data walk
(against graphs made with the onnx package), path redaction, the reload path rule, key files
(`rigcast keys`), the header depth check, and the bench smoke runs (tiny variants only)."""

from __future__ import annotations

import json
import os
import stat
import subprocess
import sys
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper
from rigcast.runtime.messaging import protocol
from rigcast.runtime.messaging.nesting import nesting_within
from rigcast.runtime.trust.keys import KeyFileError, create_key_pair, load_public_key, load_secret_key
from rigcast.runtime.trust.reload import (
    ReloadRefused,
    external_data_tensor,
    redact,
    resolve_request,
)

ROOT = Path(__file__).resolve().parents[1]


def _external(tensor: TensorProto, location: str = "secret.bin") -> TensorProto:
    tensor.ClearField("raw_data")
    tensor.data_location = TensorProto.EXTERNAL
    entry = tensor.external_data.add()
    entry.key, entry.value = "location", location
    return tensor


def _model(initializer: TensorProto | None, then_tensor: TensorProto | None = None) -> bytes:
    """y = x + w, optionally inside an If's then-branch (a nested subgraph) holding a Constant."""
    w = numpy_helper.from_array(np.ones(3, np.float32), "w")
    nodes = [helper.make_node("Add", ["x", "w"], ["y"])]
    inits = [initializer if initializer is not None else w]
    if then_tensor is not None:
        then = helper.make_graph([helper.make_node("Constant", [], ["c"], value=then_tensor)],
                                 "then", [], [helper.make_tensor_value_info("c", TensorProto.FLOAT,
                                                                            [3])])
        nodes = [helper.make_node("If", ["cond"], ["y"], then_branch=then, else_branch=then)]
    graph = helper.make_graph(
        nodes, "g", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [3]),
                     helper.make_tensor_value_info("cond", TensorProto.BOOL, [])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [3])], initializer=inits)
    return helper.make_model(graph).SerializeToString()


def test_external_data_is_found_in_initializers_and_nested_subgraphs() -> None:
    """TensorProto.data_location / external_data as onnx.proto (the ONNX IR) defines them."""
    plain = numpy_helper.from_array(np.ones(3, np.float32), "w")
    assert external_data_tensor(_model(plain)) is None
    ext = _external(numpy_helper.from_array(np.ones(3, np.float32), "w"))
    assert external_data_tensor(_model(ext)) == "w"
    nested = _external(numpy_helper.from_array(np.ones(3, np.float32), "deep"))
    assert external_data_tensor(_model(plain, then_tensor=nested)) == "deep"
    only_entry = numpy_helper.from_array(np.ones(3, np.float32), "e")
    only_entry.external_data.add().key = "location"  # entries without the enum: refused too
    assert external_data_tensor(_model(only_entry)) == "e"
    onnx.checker.check_model(onnx.load_from_string(_model(plain)))
    with pytest.raises(ValueError):
        external_data_tensor(b"\x0a\xff\xff\xff\xff\x0f")  # a length past the end


def test_redact_keeps_only_the_last_path_component() -> None:
    text = "bundle /home/stage/secret/face.rcb is corrupt; see C:\\rigs\\x\\arm.rcb"
    assert redact(text) == "bundle face.rcb is corrupt; see arm.rcb"
    assert redact("no paths here") == "no paths here"


def test_reload_paths_resolve_inside_allowed_folders_only(tmp_path: Path) -> None:
    allowed = tmp_path / "allowed"
    allowed.mkdir()
    (allowed / "ok.rcb").write_bytes(b"x")
    (tmp_path / "secret.rcb").write_bytes(b"x")
    (allowed / "link.rcb").symlink_to(tmp_path / "secret.rcb")
    assert resolve_request("ok.rcb", [allowed]) == allowed / "ok.rcb"
    assert resolve_request(str(allowed / "ok.rcb"), [allowed]) == allowed / "ok.rcb"
    for name in ("../secret.rcb", str(tmp_path / "secret.rcb"), "link.rcb", "missing.rcb", ".",
                 "ok.rcb\x00"):
        with pytest.raises(ReloadRefused, match="in the folders this server reloads from"):
            resolve_request(name, [allowed])


def test_keys_command_writes_a_private_pair_and_refuses_to_overwrite(tmp_path: Path) -> None:
    """`rigcast keys` wraps zmq.auth.create_certificates (CurveZMQ, RFC 26 key pairs)."""
    cmd = [sys.executable, "-m", "rigcast", "keys", str(tmp_path), "--name", "capture"]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr
    secret = tmp_path / "capture.key_secret"
    assert stat.S_IMODE(os.stat(secret).st_mode) == 0o600
    public, _ = load_secret_key(secret)
    assert load_public_key(tmp_path / "capture.key") == public and len(public) == 40
    again = subprocess.run(cmd, capture_output=True, text=True, timeout=60)
    assert again.returncode == 1 and again.stderr.startswith("rigcast: error:")
    assert "exists" in again.stderr and "Traceback" not in again.stderr
    with pytest.raises(KeyFileError, match="holds no secret key"):
        load_secret_key(tmp_path / "capture.key")
    with pytest.raises(KeyFileError, match="plain file name"):
        create_key_pair(tmp_path, "../evil")


def test_the_decoder_refuses_deep_headers_without_recursion() -> None:
    for depth, words in ((900, "deeper"), (4000, "not valid msgpack")):  # msgpack's own limit
        deep = b"\x83\xa1v\x01\xa4type\xa4mesh\xa6stream" + b"\x91" * depth + b"\x01"
        with pytest.raises(protocol.FrameError, match=words) as info:
            protocol.decode_header(deep, max_header_bytes=1 << 20)
        assert info.value.reason == "malformed"
    assert nesting_within({"a": [1, [2]]}, 3) and not nesting_within({"a": [1, [2]]}, 2)


@pytest.mark.timeout(300)
def test_fuzz_and_soak_benches_run_small(tmp_path: Path) -> None:
    """Tiny variants only: the real runs are bench/fuzz.py and bench/soak.py."""
    fuzz = subprocess.run([sys.executable, str(ROOT / "bench" / "fuzz.py"), "--messages",
                           "3000", "--out", str(tmp_path)], capture_output=True, text=True,
                          timeout=240)
    assert fuzz.returncode == 0, fuzz.stderr[-2000:]
    result = json.loads((tmp_path / "fuzz.json").read_text())
    assert result["sent"] >= 3000 and result["crashes"] == 0 and result["unaccounted"] == 0
    assert result["valid_frames_mismatched"] == 0 and result["valid_frames_bit_exact"] > 0
    soak = subprocess.run([sys.executable, str(ROOT / "bench" / "soak.py"), "--minutes", "0.1",
                           "--fps", "60", "--vertices", "1000", "--warmup", "2", "--out",
                           str(tmp_path)], capture_output=True, text=True, timeout=240)
    assert soak.returncode == 0, soak.stderr[-2000:]
    result = json.loads((tmp_path / "soak.json").read_text())
    assert result["unaccounted"] == 0 and len(result["per_stream"]) == 3
