"""The code passes the project's linter (ruff, configured in pyproject.toml)."""

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def test_ruff_finds_nothing():
    ruff = shutil.which("ruff") or str(Path(sys.executable).parent / "ruff")
    if not Path(ruff).exists():
        pytest.skip("ruff is not installed (it is in the test extra)")
    proc = subprocess.run([ruff, "check", "passivefit", "tests", "benchmarks"], cwd=ROOT,
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stdout + proc.stderr
