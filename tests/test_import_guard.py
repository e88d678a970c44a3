"""The runtime must never pull in torch or the offline half (DEVELOPERS.md, 'Layout and data flow')."""

from __future__ import annotations

import subprocess
import sys
import textwrap

# Every runtime module must be importable in a process where torch cannot be imported at all.
GUARD = textwrap.dedent(
    """
    import importlib, pkgutil, sys

    class Block:
        def find_spec(self, name, path=None, target=None):
            if name == "torch" or name.startswith("torch."):
                raise ImportError("torch is blocked in this test")
            return None

    sys.meta_path.insert(0, Block())
    import rigcast.runtime as rt
    for mod in pkgutil.walk_packages(rt.__path__, "rigcast.runtime."):
        importlib.import_module(mod.name)
    bad = sorted(m for m in sys.modules if m == "torch" or m.startswith(("torch.", "rigcast.export")))
    print("LOADED:" + ",".join(bad))
    """
)


def test_runtime_imports_without_torch_or_export() -> None:
    proc = subprocess.run(
        [sys.executable, "-c", GUARD], capture_output=True, text=True, timeout=120, check=False
    )
    assert proc.returncode == 0, proc.stderr
    line = [ln for ln in proc.stdout.splitlines() if ln.startswith("LOADED:")][-1]
    assert line == "LOADED:", f"runtime pulled in forbidden modules: {line}"


def test_guard_really_blocks_torch() -> None:
    """The guard itself must be able to fail: importing torch under it raises."""
    code = GUARD.split("import rigcast.runtime")[0] + "import torch\n"
    proc = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=False
    )
    assert proc.returncode != 0
    assert "torch is blocked" in proc.stderr
