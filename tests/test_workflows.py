"""The scripts in workflows/ run as written: exit 0 and save their figure.

Each script runs in a subprocess with matplotlib's Agg backend and ``--out`` in a temporary folder.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

WORKFLOWS = Path(__file__).resolve().parents[1] / "workflows"


@pytest.mark.parametrize(
    ("script", "figure"),
    [
        ("synthetic_plateau.py", "synthetic_plateau.png"),
        ("viscosity_sweep.py", "viscosity_sweep.png"),
    ],
)
def test_workflow_runs_and_saves_its_figure(tmp_path, script, figure):
    out = tmp_path / "out"
    env = {**os.environ, "MPLBACKEND": "Agg"}
    result = subprocess.run(
        [sys.executable, str(WORKFLOWS / script), "--out", str(out)],
        capture_output=True,
        text=True,
        env=env,
        cwd=tmp_path,
        timeout=120,
    )
    assert result.returncode == 0, result.stderr
    path = out / figure
    assert path.is_file() and path.stat().st_size > 10_000
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "figure:" in result.stdout
