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
from pathlib import Path

import pytest
from conftest import SCENARIO, airy, bump, write_grid

#: The checkout whose crustflow the subprocesses run.
ROOT = Path(__file__).resolve().parents[2]


def _snapshot(folder):
    return {
        p.relative_to(folder).as_posix(): p.read_bytes()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


def _crustflow(args, **kwargs):
    env = dict(os.environ, PYTHONPATH=str(ROOT))
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
def test_file_size_limit_mid_write(tmp_path, formats):
    """A small disk quota (RLIMIT_FSIZE, in the child only) that fills while writing."""
    topo = bump(shape=(400, 400), cell=2e3, radius=300e3)
    write_grid(tmp_path / "topo.tif", topo, cell=2e3)
    write_grid(tmp_path / "crust.tif", airy(topo), cell=2e3)
    (tmp_path / "s.toml").write_text(SCENARIO + f"[output]\nformats = {formats}\n")
    (tmp_path / "mine.txt").write_text("the user's")
    out = tmp_path / "deeper" / "out"
    proc = _crustflow(
        ["run", str(tmp_path / "s.toml"), "--out", str(out), "--quiet"],
        preexec_fn=_limit_file_size(200_000),  # writes only: the 640 kB inputs are read freely
    )
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 1, err
    # libtiff prints its own "_tiffWriteProc/_tiffSeekProc: File too large." lines to stderr (C code,
    # outside Python's reach); crustflow's own report is one line
    lines = [line for line in err.strip().splitlines() if not line.startswith("_tiff")]
    assert len(lines) == 1, err
    assert re.search(r"file size limit reached|no space left on the device", lines[0]), err
    assert "report it" not in err
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        "crust.tif",
        "mine.txt",
        "s.toml",
        "topo.tif",
    ]


# ---------------------------------------------------------------------------------------------
# bad inputs: exit 2, one line naming the input and the fix, nothing written or removed


def _replace(old, new):
    return lambda text: text.replace(old, new)


def _append(extra):
    return lambda text: text + extra


def _truncated(d):
    data = (d / "topo.tif").read_bytes()
    (d / "trunc.tif").write_bytes(data[: len(data) // 2])


def _no_crs(d):
    topo = bump()
    write_grid(d / "nocrs_t.tif", topo, crs=None)
    write_grid(d / "nocrs_c.tif", airy(topo), crs=None)


def _one_vertex_line(d):
    (d / "line1.geojson").write_text(
        '{"type": "FeatureCollection", "crs": {"type": "name", "properties": {"name": '
        '"urn:ogc:def:crs:EPSG::32633"}}, "features": [{"type": "Feature", "properties": '
        '{"name": "north margin"}, "geometry": {"type": "LineString", "coordinates": '
        "[[380000, 5100000]]}}]}"
    )


def _triangle_ring(d):
    (d / "ring.geojson").write_text(
        '{"type": "FeatureCollection", "crs": {"type": "name", "properties": {"name": '
        '"urn:ogc:def:crs:EPSG::32633"}}, "features": [{"type": "Feature", "properties": '
        '{"name": "basin"}, "geometry": {"type": "Polygon", "coordinates": '
        "[[[380000, 5100000], [390000, 5100000], [380000, 5100000]]]}}]}"
    )


def _high_topography(d):
    write_grid(d / "high.tif", bump() + 12000.0)


def _deep_topography(d):
    write_grid(d / "deep.tif", bump() - 15000.0)


def _moho_above_sea_level(d):
    write_grid(d / "moho_up.tif", bump() * 0 - 2000.0)


def _stiff_viscosity_grid(d):
    write_grid(d / "eta.tif", bump() * 0 + 1e30)


_VISCOSITY = '"1e19 Pa*s"'

#: case -> (edit of the scenario text, setup of files, message pattern).
BAD_INPUTS = {
    # the hostile unit strings: refused by the grammar before pint sees them
    "power tower": (
        _replace(_VISCOSITY, '"9**9**9 Pa*s"'),
        None,
        r"channel.viscosity = '9\*\*9\*\*9 Pa\*s' is not a number followed by units .*"
        r'write e.g. channel.viscosity = "1e19 Pa\*s"',
    ),
    "unit power tower": (
        _replace(_VISCOSITY, '"1 Pa^9^9^9*s"'),
        None,
        r"channel.viscosity .*a power of a power.*write e.g.",
    ),
    "huge unit power": (
        _replace('"15 km"', '"15 km^999"'),
        None,
        r"channel.thickness .*a unit power must be a small number",
    ),
    "import call": (
        _replace('"15 km"', "\"__import__('os').system('touch pwned') m\""),
        None,
        r"channel.thickness = .*__import__.* does not start with a number; .*"
        r'e.g. channel.thickness = "15 km"',
    ),
    "subclasses": (
        _replace('"15 km"', '"().__class__.__base__.__subclasses__() km"'),
        None,
        r"channel.thickness = .*does not start with a number",
    ),
    "unbalanced parenthesis": (
        _replace(_VISCOSITY, '"1e19 Pa*s)"'),
        None,
        r"channel.viscosity = '1e19 Pa\*s\)' is not a number followed by units \(unbalanced "
        r"parentheses\)",
    ),
    "infinite viscosity": (
        _replace(_VISCOSITY, '"inf Pa*s"'),
        None,
        r"channel.viscosity = 'inf Pa\*s' is not a finite number",
    ),
    "overflowing number": (
        _replace(_VISCOSITY, '"1e999 Pa*s"'),
        None,
        r"channel.viscosity = '1e999 Pa\*s' is not a finite number",
    ),
    "absurd viscosity": (
        _replace(_VISCOSITY, '"1e40 Pa*s"'),
        None,
        r"channel.viscosity = 1e\+40 Pa s lies outside 1e15-1e25 Pa s",
    ),
    "tiny viscosity": (
        _replace(_VISCOSITY, '"1e3 Pa*s"'),
        None,
        r"channel.viscosity = 1e\+03 Pa s lies outside 1e15-1e25 Pa s",
    ),
    "viscosity grid out of range": (
        _replace(_VISCOSITY, '{ grid = "eta.tif", units = "Pa*s" }'),
        _stiff_viscosity_grid,
        r"channel.viscosity grid has \d+ cells outside 1e15-1e25 Pa s",
    ),
    "nested 5000 deep": (
        _append("x = " + "[" * 5000 + "]" * 5000 + "\n"),
        None,
        r"nests tables or arrays too deeply to read; a scenario needs at most 8 levels",
    ),
    "nested 20 deep": (
        _append("x = " + "[" * 20 + "]" * 20 + "\n"),
        None,
        r"nests tables or arrays deeper than 8 levels",
    ),
    "truncated GeoTIFF": (
        _replace('"topo.tif"', '"trunc.tif"'),
        _truncated,
        r"grids.topography: .*trunc.tif cannot be read \(.*\); the file is truncated or "
        r"corrupt: copy or export it again",
    ),
    "unknown CRS code": (
        lambda t: (
            t.replace('"topo.tif"', '"nocrs_t.tif"')
            .replace('"crust.tif"', '"nocrs_c.tif"')
            .replace("crust_thickness", 'crs = "EPSG:999999"\ncrust_thickness')
        ),
        _no_crs,
        r"grids.crs = 'EPSG:999999' is not a CRS PROJ knows .*give a valid code, e.g. "
        r'crs = "EPSG:32633"',
    ),
    "one-vertex section": (
        _append('[budgets]\nsections = "line1.geojson"\n'),
        _one_vertex_line,
        r"sections file .*line1.geojson': feature 'north margin' has an invalid geometry "
        r"\(.*\); a line needs two or more vertices",
    ),
    "two-point ring": (
        _append('[budgets]\nregions = "ring.geojson"\n'),
        _triangle_ring,
        r"regions file .*ring.geojson': region 'basin' is not a valid polygon \(Too few points",
    ),
    "topography too high": (
        _replace('"topo.tif"', '"high.tif"'),
        _high_topography,
        r"grids.topography has values from 12200 to 15181.2 m, outside Earth's -11 km to \+9 km; "
        r"give elevations in metres and tag fill values as nodata",
    ),
    "topography too deep": (
        _replace('"topo.tif"', '"deep.tif"'),
        _deep_topography,
        r"grids.topography has values from -14800 to -11818.8 m, outside Earth's -11 km to \+9 km",
    ),
    "Moho above sea level": (
        _replace('crust_thickness = "crust.tif"', 'moho_depth = "moho_up.tif"'),
        _moho_above_sea_level,
        r"grids.moho_depth is at or above sea level everywhere \(max -2000 m\); .*check the sign",
    ),
}


@pytest.fixture
def grids_dir(tmp_path):
    topo = bump()
    write_grid(tmp_path / "topo.tif", topo)
    write_grid(tmp_path / "crust.tif", airy(topo))
    return tmp_path


@pytest.mark.parametrize("case", list(BAD_INPUTS))
def test_bad_input_is_one_line_exit_2(grids_dir, capsys, case):
    from crustflow.cli import main

    edit, setup, message = BAD_INPUTS[case]
    if setup:
        setup(grids_dir)
    (grids_dir / "bad.toml").write_text(edit(SCENARIO))
    before = _snapshot(grids_dir)
    out = grids_dir / "new" / "out"
    assert main(["run", str(grids_dir / "bad.toml"), "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1, err
    assert err.startswith("crustflow: error: ") and re.search(message, err), err
    assert "report it" not in err
    assert _snapshot(grids_dir) == before
    assert not (grids_dir / "new").exists()
    assert not (grids_dir / "pwned").exists() and not os.path.exists("pwned")


def test_hanging_unit_string_is_refused_in_a_subprocess(grids_dir):
    """The power tower that once never returned: a fresh process answers (the timeout only
    guards against a hang; no timing is asserted)."""
    (grids_dir / "bad.toml").write_text(SCENARIO.replace(_VISCOSITY, '"9**9**9 Pa*s"'))
    proc = _crustflow(["check", str(grids_dir / "bad.toml")])
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 2
    assert "is not a number followed by units" in err


def test_byte_order_mark_is_accepted(grids_dir, capsys):
    from crustflow.cli import main

    (grids_dir / "bom.toml").write_bytes(b"\xef\xbb\xbf" + SCENARIO.encode())
    assert main(["check", str(grids_dir / "bom.toml")]) == 0
    assert "check passed" in capsys.readouterr().out


def test_not_utf8_is_named(grids_dir, capsys):
    from crustflow.cli import main

    (grids_dir / "latin.toml").write_bytes(SCENARIO.encode() + b"# caf\xe9\n")
    assert main(["check", str(grids_dir / "latin.toml")]) == 2
    err = capsys.readouterr().err.strip()
    assert re.fullmatch(
        r"crustflow: error: scenario file .*latin.toml is not UTF-8 text "
        r"\(byte \d+\); save it as UTF-8",
        err,
    ), err


def test_profile_at_nan_is_exit_2(grids_dir, capsys):
    from crustflow.cli import main

    (grids_dir / "s.toml").write_text(SCENARIO)
    before = _snapshot(grids_dir)
    args = ["profile", str(grids_dir / "s.toml"), "--at", "nan", "nan"]
    assert main([*args, "--out", str(grids_dir / "p"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert re.fullmatch(
        r"crustflow: error: site 'nan_nan' has coordinates \(nan, nan\); give two finite numbers",
        err,
    ), err
    assert _snapshot(grids_dir) == before and not (grids_dir / "p").exists()


# ---------------------------------------------------------------------------------------------
# memory: refused before any work, naming the estimate and the limit


def _ensemble_text(members):
    return SCENARIO + (
        f"[ensemble]\nmembers = {members}\nseed = 1\n[ensemble.vary]\n"
        '"channel.viscosity" = { distribution = "log-uniform", low = "1e18 Pa*s", '
        'high = "1e20 Pa*s" }\n'
    )


@pytest.mark.parametrize("command", ["run", "ensemble"])
def test_billion_members_refused_before_work(grids_dir, capsys, monkeypatch, command):
    import crustflow.analyses.ensemble.run as ensemble_run
    from crustflow.cli import main

    monkeypatch.setattr(ensemble_run, "sample_members", lambda *a: pytest.fail("work started"))
    (grids_dir / "s.toml").write_text(_ensemble_text(1_000_000_000))
    before = _snapshot(grids_dir)
    out = grids_dir / "out"
    assert main([command, str(grids_dir / "s.toml"), "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert re.fullmatch(
        r"crustflow: error: 1000000000 ensemble members need at least [\d.]+ [GTP]iB of memory, "
        r"more than the [\d.]+ \w+ this machine has available \(80% of [\d.]+ \w+\); use fewer "
        r"\[ensemble\] members",
        err,
    ), err
    assert _snapshot(grids_dir) == before and not out.exists()


def test_memory_limit_is_the_machines(grids_dir, capsys, monkeypatch):
    import crustflow.analyses.memory as memory
    from crustflow.cli import main

    monkeypatch.setattr(memory, "available_memory", lambda: 1 << 30)  # a 1 GiB machine
    (grids_dir / "s.toml").write_text(_ensemble_text(4_000_000))
    assert main(["ensemble", str(grids_dir / "s.toml"), "--out", str(grids_dir / "o")]) == 2
    err = capsys.readouterr().err
    assert "4000000 ensemble members need at least 1.4 GiB" in err
    assert "than the 819 MiB this machine has available (80% of 1 GiB)" in err


def test_memory_estimate_of_the_fast_path():
    # 8 bytes x members x (40 work arrays + 3 x 1 varied value + 4): value derived from the
    # ensemble's documented buffers (analyses/ensemble/run.py FULL_ARRAYS)
    from types import SimpleNamespace

    from crustflow.analyses.memory import ensemble_floor
    from crustflow.scenario.ensemble import parse_ensemble
    from crustflow.scenario.parameters import ModelParameters

    params = ModelParameters(channel_thickness=15e3, viscosity=1e19)
    spec = parse_ensemble(
        {
            "members": 1000,
            "seed": 1,
            "vary": {
                "channel.viscosity": {
                    "distribution": "log-uniform",
                    "low": "1e18 Pa*s",
                    "high": "1e20 Pa*s",
                }
            },
        },
        params,
    )
    scenario = SimpleNamespace(ensemble=spec, channel=None, load=None)
    need, what, _ = ensemble_floor(scenario)
    assert need == 8 * 1000 * (40 + 3 + 4) and what == "1000 ensemble members"


# ---------------------------------------------------------------------------------------------
# output locations that cannot be written, disks that fill


def test_unwritable_location_is_exit_2(grids_dir, capsys, monkeypatch):
    import errno
    import tempfile

    import crustflow.io.folders as folders
    from crustflow.cli import main

    def refuse(*args, **kwargs):
        raise PermissionError(errno.EACCES, "Permission denied")

    monkeypatch.setattr(folders.tempfile, "mkdtemp", refuse)
    (grids_dir / "s.toml").write_text(SCENARIO)
    before = _snapshot(grids_dir)
    out = grids_dir / "new" / "out"
    assert main(["run", str(grids_dir / "s.toml"), "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert re.fullmatch(
        r"crustflow: error: cannot write to .*new/out \(Permission denied\); choose another "
        r"--out folder",
        err,
    ), err
    assert _snapshot(grids_dir) == before and not (grids_dir / "new").exists()
    assert tempfile.mkdtemp is refuse


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders")
def test_read_only_folder_is_exit_2(grids_dir, capsys):
    from crustflow.cli import main

    (grids_dir / "s.toml").write_text(SCENARIO)
    (grids_dir / "ro").mkdir(mode=0o555)
    assert main(["run", str(grids_dir / "s.toml"), "--out", str(grids_dir / "ro" / "out")]) == 2
    assert "choose another --out folder" in capsys.readouterr().err


@pytest.mark.parametrize(
    ("error", "message", "status"),
    [
        (OSError(28, "No space left on device"), "no space left on the device", 1),
        (OSError(27, "File too large"), "file size limit reached", 1),
        (RuntimeError("NetCDF: HDF error"), r"NetCDF: HDF error\), most likely no space", 1),
        (PermissionError(13, "Permission denied"), r"cannot write to .*choose another --out", 2),
    ],
)
def test_write_failures_mid_run(grids_dir, capsys, monkeypatch, error, message, status):
    from crustflow.cli import main
    from crustflow.io.writers import NetcdfWriter

    def fail(self, row0, arrays):
        raise error

    monkeypatch.setattr(NetcdfWriter, "write_rows", fail)
    (grids_dir / "s.toml").write_text(SCENARIO)
    before = _snapshot(grids_dir)
    out = grids_dir / "new" / "out"
    assert main(["run", str(grids_dir / "s.toml"), "--out", str(out), "--quiet"]) == status
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and re.search(message, err), err
    assert "report it" not in err
    assert _snapshot(grids_dir) == before and not (grids_dir / "new").exists()


# ---------------------------------------------------------------------------------------------
# suspicious but legal inputs: a one-line warning, and the run goes on


def _untagged_fill(path):
    import rasterio

    topo = bump()
    topo[:4, :4] = -9999.0
    write_grid(path, topo)
    with rasterio.open(path, "r+") as dst:
        dst.nodata = None


@pytest.mark.parametrize(
    ("make", "message"),
    [
        (
            _untagged_fill,
            r"grids.topography: topo2.tif has no nodata tag but 16 cells hold -9999, a common "
            r"fill value; they are read as data",
        ),
        (
            lambda p: write_grid(p, bump(), nodata=0.0),
            r"grids.topography: topo2.tif tags 0 as nodata, a value real data take",
        ),
    ],
)
def test_suspicious_nodata_warns(grids_dir, capsys, make, message):
    from crustflow.cli import main

    make(grids_dir / "topo2.tif")
    (grids_dir / "s.toml").write_text(SCENARIO.replace('"topo.tif"', '"topo2.tif"'))
    assert main(["check", str(grids_dir / "s.toml")]) == 0
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and re.search(rf"crustflow: warning: {message}", err[0]), err


def test_float32_overflow_is_written_as_nodata(tmp_path):
    import numpy as np
    import rasterio
    from rasterio.transform import Affine

    from crustflow.io.writers import GeotiffWriter

    values = np.full((20, 20), 1.0)
    values[0, 0] = 1e40  # beyond float32's 3.4e38 (IEEE 754 binary32)
    writer = GeotiffWriter(
        tmp_path / "a.tif",
        crs="EPSG:32633",
        transform=Affine(1e3, 0, 0, 0, -1e3, 0),
        height=20,
        width=20,
        attrs={"long_name": "test", "units": "1"},
    )
    with pytest.warns(UserWarning, match="1 cells exceed the float32 range .* written as nodata"):
        writer.write_rows(0, values)
    writer.close()
    with rasterio.open(tmp_path / "a.tif") as src:
        data = src.read(1)
    assert np.isnan(data[0, 0]) and not np.isinf(data).any() and data[1, 1] == 1.0


def test_signal_handlers_are_restored(grids_dir, capsys):
    from crustflow.cli import main

    def mine(signum, frame):  # a host program's own handler
        pass

    previous = signal.signal(signal.SIGTERM, mine)
    try:
        assert main(["check", str(grids_dir / "missing.toml")]) == 2
        assert signal.getsignal(signal.SIGTERM) is mine
        assert signal.getsignal(signal.SIGHUP) is not None
    finally:
        signal.signal(signal.SIGTERM, previous)
    assert "scenario file not found" in capsys.readouterr().err


def test_interrupt_exception_carries_the_signal():
    from crustflow.errors import CrustflowInterrupt

    exc = CrustflowInterrupt(signal.SIGTERM)
    assert isinstance(exc, KeyboardInterrupt) and exc.signum == 15
