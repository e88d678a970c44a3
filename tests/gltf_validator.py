"""Run the Khronos glTF validator (npm package ``gltf-validator``) on a written asset.

CI installs it with ``npm install --prefix .tools gltf-validator@2.0.0-dev.3.10`` (see .ci/run).
Locally a missing validator skips the test with the reason; under CI (env var ``CI`` set) it fails,
because CI must really validate.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
from pathlib import Path
from typing import Any, NoReturn

import pytest

ROOT = Path(__file__).resolve().parent.parent
VALIDATOR_DIR = ROOT / ".tools" / "node_modules" / "gltf-validator"
SCRIPT = Path(__file__).resolve().parent / "validate_gltf.mjs"
INSTALL_HINT = "npm install --prefix .tools gltf-validator@2.0.0-dev.3.10"


def _missing(reason: str) -> NoReturn:
    if os.environ.get("CI"):
        pytest.fail(f"Khronos glTF validator unavailable under CI: {reason}")
    pytest.skip(f"Khronos glTF validator unavailable ({reason}); install it with `{INSTALL_HINT}`")


def validate(asset: Path) -> dict[str, Any]:
    """Return the validator's JSON report for ``asset``; skip or fail when it cannot run."""
    node = shutil.which("node")
    if node is None:
        _missing("node is not on PATH")
    if not (VALIDATOR_DIR / "package.json").exists():
        _missing(f"{VALIDATOR_DIR} does not exist")
    proc = subprocess.run(
        [str(node), str(SCRIPT), str(VALIDATOR_DIR), str(asset)],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert proc.returncode == 0, f"validator crashed on {asset}: {proc.stderr}"
    report: dict[str, Any] = json.loads(proc.stdout)
    return report


def errors(report: dict[str, Any]) -> list[dict[str, Any]]:
    """The issues of severity 0 (errors) in a report."""
    messages = report.get("issues", {}).get("messages", [])
    return [m for m in messages if m.get("severity") == 0]


def assert_valid(asset: Path) -> dict[str, Any]:
    """Validate ``asset`` and assert zero errors; returns the report for further checks."""
    report = validate(asset)
    errs = errors(report)
    assert report["issues"]["numErrors"] == 0 and not errs, json.dumps(errs, indent=1)
    return report
