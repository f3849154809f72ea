"""Progress: a bar on a terminal, log lines elsewhere; stage lines as each stage starts; a summary
for every command (common practice for command-line tools, no source)."""

from __future__ import annotations

import logging

from conftest import SCENARIO

from crustflow.cli import main
from crustflow.engine.progress import Progress


def test_progress_logs_lines_off_a_terminal(caplog):
    with caplog.at_level(logging.INFO, logger="crustflow.progress"):
        with Progress(10, unit=" rows", desc="compute and write", log_every=0.0) as p:
            for _ in range(10):
                p.update(1)
    lines = [r.getMessage() for r in caplog.records]
    assert lines[0].startswith("compute and write: 1 of 10 rows (10 %)")
    assert "10 of 10 rows (100 %)" in lines[-1]


def test_stage_lines_come_as_stages_start_and_the_run_prints_a_summary(scenario_dir, capsys):
    out = scenario_dir / "out"
    assert main(["run", str(scenario_dir / "scenario.toml"), "--out", str(out)]) == 0
    captured = capsys.readouterr()
    stages = [line for line in captured.err.splitlines() if line.startswith("crustflow: ")]
    assert stages[0] == "crustflow: open grids"
    assert stages.index("crustflow: compute and write") < stages.index("crustflow: write manifest")
    assert stages.count("crustflow: compute and write") == 1
    assert "flux magnitude" in captured.out and "backflow cells" in captured.out


def test_every_command_prints_a_summary(scenario_dir, capsys):
    text = SCENARIO + (
        "\n[ensemble]\nmembers = 12\nseed = 3\n[ensemble.vary]\n"
        '"channel.viscosity" = { distribution = "log-uniform", low = "1e18 Pa*s", '
        'high = "1e20 Pa*s" }\n'
    )
    (scenario_dir / "e.toml").write_text(text)
    assert main(["ensemble", str(scenario_dir / "e.toml"), "--out", str(scenario_dir / "e")]) == 0
    assert "members          12 (fast base-map path)" in capsys.readouterr().out
    assert main(["check", str(scenario_dir / "scenario.toml")]) == 0
    assert "check passed" in capsys.readouterr().out


def test_progress_lines_round_model_time(caplog):
    # A progress in model time (Myr, fractional) reads as rounded numbers, not float reprs.
    caplog.set_level(logging.INFO, logger="crustflow.engine.progress")
    with Progress(2.0, unit=" Myr", desc="model time", log_every=0.0) as bar:
        bar.update(0.19124468277267007)
    assert "model time: 0.1912 of 2 Myr (10 %)" in caplog.text
