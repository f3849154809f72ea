"""Faults a careless or hostile user, a batch scheduler or a full disk cause: each ends with the
documented exit status and one line, and leaves nothing of crustflow's behind and nothing of the
user's removed. Grids are invented (tests/conftest.py), written into the test's folder.
"""

from __future__ import annotations

import os
import re
import resource
import signal
import subprocess
import sys
import time

import pytest

from tests.conftest import SCENARIO, airy, bump, write_grid


def _snapshot(folder):
    return {
        p.relative_to(folder).as_posix(): p.read_bytes()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


def _crustflow(args, **kwargs):
    env = dict(os.environ, PYTHONPATH=os.getcwd())
    return subprocess.Popen(
        [sys.executable, "-m", "crustflow", *args],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=env,
        **kwargs,
    )


@pytest.fixture(scope="module")
def big_scenario(tmp_path_factory):
    """A 2000 x 2000 scenario (invented plateau) and a small one, in one folder."""
    folder = tmp_path_factory.mktemp("big")
    topo = bump(shape=(2000, 2000), cell=500.0, radius=400e3)
    write_grid(folder / "topo.tif", topo, cell=500.0)
    write_grid(folder / "crust.tif", airy(topo), cell=500.0)
    (folder / "big.toml").write_text(SCENARIO)
    small = bump()
    write_grid(folder / "small_topo.tif", small)
    write_grid(folder / "small_crust.tif", airy(small))
    text = SCENARIO.replace("topo.tif", "small_topo.tif").replace("crust.tif", "small_crust.tif")
    (folder / "small.toml").write_text(text + '[output]\nformats = ["netcdf"]\n')
    return folder


def _wait_for_partial(folder, name, proc, timeout=120.0):
    """Poll until the run's partial folder holds a file (writing has started)."""
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        for partial in folder.glob(f".{name}.partial-*"):
            if any(p.name != ".crustflow-partial.json" for p in partial.iterdir()):
                return partial
        assert proc.poll() is None, proc.communicate()
        time.sleep(0.05)
    pytest.fail("the run never started writing")


@pytest.mark.parametrize(("sig", "status"), [(signal.SIGTERM, 143), (signal.SIGHUP, 129)])
def test_signal_ends_the_run_cleanly(big_scenario, sig, status):
    folder = big_scenario
    out = folder / f"out_{sig.name}"
    # an earlier output folder in the same place must survive the interrupted run
    earlier = _crustflow(["run", str(folder / "small.toml"), "--out", str(out), "--quiet"])
    assert earlier.wait() == 0, earlier.communicate()
    before = _snapshot(folder)
    proc = _crustflow(["run", str(folder / "big.toml"), "--out", str(out), "--quiet"])
    _wait_for_partial(folder, out.name, proc)
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == status, err
    assert err.strip().splitlines() == ["crustflow: interrupted; nothing was written"]
    assert not list(folder.glob(f".{out.name}.*"))
    assert _snapshot(folder) == before


def _limit_file_size(limit):
    def preexec():
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # write() then fails with EFBIG
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))

    return preexec


@pytest.mark.parametrize("formats", ['["netcdf"]', '["geotiff"]'])
def test_file_size_limit_mid_write(big_scenario, tmp_path, formats):
    """A small disk quota (RLIMIT_FSIZE, in the child only) that fills while writing."""
    folder = big_scenario
    text = (folder / "big.toml").read_text().replace('"topo.tif"', f'"{folder / "topo.tif"}"')
    text = text.replace('"crust.tif"', f'"{folder / "crust.tif"}"')
    (tmp_path / "s.toml").write_text(text + f"[output]\nformats = {formats}\n")
    (tmp_path / "mine.txt").write_text("the user's")
    out = tmp_path / "deeper" / "out"
    proc = _crustflow(
        ["run", str(tmp_path / "s.toml"), "--out", str(out), "--quiet"],
        preexec_fn=_limit_file_size(2_000_000),
    )
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 1, err
    # libtiff prints its own "_tiffWriteProc: File too large." lines straight to stderr (C code,
    # outside Python's reach); crustflow's own report is one line
    lines = [line for line in err.strip().splitlines() if not line.startswith("_tiffWriteProc")]
    assert len(lines) == 1, err
    assert re.search(r"file size limit reached|no space left on the device", lines[0]), err
    assert "report it" not in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["mine.txt", "s.toml"]
