"""The one-way import rule between layers, made executable with import-linter."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_layer_contracts_hold() -> None:
    exe = shutil.which("lint-imports", path=str(Path(sys.executable).parent))
    assert exe is not None, "import-linter is part of the test extra"
    run = subprocess.run(
        [exe, str(ROOT / "pyproject.toml")],
        cwd=ROOT,
        capture_output=True,
        text=True,
        check=False,
    )
    assert run.returncode == 0, run.stdout + run.stderr
