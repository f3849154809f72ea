"""Output-folder ownership: crustflow replaces only a folder it provably wrote and removes only the
files it listed; inputs (the scenario file included) are never replaced; partial folders of killed
runs are cleaned only when their marker proves they are crustflow's and their process is gone.

Every case checks the exit status, the one line on stderr, and that nothing outside crustflow's
own files was removed (the invented grids come from tests/conftest.py).
"""

from __future__ import annotations

import json
import os
import re
import socket
import subprocess
import sys

import pytest

from crustflow.cli import main
from crustflow.errors import CrustflowInputError
from crustflow.io.folders import (
    MANIFEST,
    OWNER_KEY,
    PARTIAL_MARKER,
    atomic_folder,
    check_out_dir,
    foreign_entries,
    stale_partials,
    write_manifest,
)


def _snapshot(folder):
    """Every file under ``folder`` with its bytes (to show nothing was removed or changed)."""
    return {
        p.relative_to(folder).as_posix(): p.read_bytes()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


def _one_line(capsys, pattern):
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1, err
    assert re.search(pattern, err), err
    return err


def _run(scenario, out, *extra):
    return main(["run", str(scenario), "--out", str(out), "--quiet", *extra])


@pytest.fixture
def small_run(scenario_dir):
    """The small scenario with only its NetCDF written (quick), run once into ``out``."""
    text = (scenario_dir / "scenario.toml").read_text()
    text += '[output]\nformats = ["netcdf"]\nvariables = ["flux_east"]\n'
    (scenario_dir / "scenario.toml").write_text(text)
    out = scenario_dir / "out"
    assert _run(scenario_dir / "scenario.toml", out) == 0
    return scenario_dir, out


# ---------------------------------------------------------------------------------------------
# the manifest's ownership listing


def test_manifest_lists_every_entry_with_kind_and_size(tmp_path):
    with atomic_folder(tmp_path / "out") as tmp:
        (tmp / "a.csv").write_text("x\n1\n")
        (tmp / "sub").mkdir()
        (tmp / "sub" / "b.txt").write_text("b")
        write_manifest(tmp, {}, ["a.csv", "sub/b.txt"])
    manifest = json.loads((tmp_path / "out" / MANIFEST).read_text())
    files = manifest[OWNER_KEY]["files"]
    assert manifest[OWNER_KEY]["format"] == 1
    assert files["a.csv"]["kind"] == "file" and files["a.csv"]["size"] == 4
    assert len(files["a.csv"]["sha256"]) == 64
    assert files["sub"] == {"kind": "folder"}
    assert PARTIAL_MARKER not in files and MANIFEST not in files
    assert not (tmp_path / "out" / PARTIAL_MARKER).exists()
    assert foreign_entries(tmp_path / "out") == []


def test_rerun_replaces_own_folder_and_removes_only_listed_files(small_run, capsys):
    scenario_dir, out = small_run
    first = json.loads((out / MANIFEST).read_text())
    assert _run(scenario_dir / "scenario.toml", out) == 0
    assert json.loads((out / MANIFEST).read_text())["created"] >= first["created"]
    assert sorted(p.name for p in out.iterdir()) == ["fields.nc", "report.html", MANIFEST]
    assert not [p for p in scenario_dir.iterdir() if p.name.startswith(".out.")]


# ---------------------------------------------------------------------------------------------
# folders crustflow cannot prove it wrote: exit 2, one line, nothing removed


def _foreign_manifest(out):
    out.mkdir()
    (out / MANIFEST).write_text('{"job": "other", "status": "done"}')
    (out / "thesis_results.xlsx").write_bytes(b"PK\x03\x04 a spreadsheet")


def _extra_file(out):
    (out / "notes.txt").write_text("my notes")


def _edited_file(out):
    (out / "fields.nc").write_bytes(b"replaced by the user")


def _same_size_edit(out):
    data = bytearray((out / MANIFEST).read_bytes())
    listing = json.loads(data)[OWNER_KEY]["files"]
    assert "sha256" in listing["fields.nc"]  # small file: checksummed
    nc = bytearray((out / "fields.nc").read_bytes())
    nc[-1] ^= 0xFF
    (out / "fields.nc").write_bytes(bytes(nc))


def _file_became_folder(out):
    (out / "fields.nc").unlink()
    (out / "fields.nc").mkdir()
    (out / "fields.nc" / "keep.txt").write_text("mine")


def _hidden_file(out):
    (out / ".mine").write_text("hidden but mine")


def _symlink(out):
    (out / "link").symlink_to(out.parent / "topo.tif")


def _marker_removed(out):
    manifest = json.loads((out / MANIFEST).read_text())
    del manifest[OWNER_KEY]
    (out / MANIFEST).write_text(json.dumps(manifest))


def _listed_file_missing(out):
    (out / "fields.nc").unlink()


@pytest.mark.parametrize(
    ("change", "named"),
    [
        (_extra_file, "notes.txt"),
        (_edited_file, "fields.nc"),
        (_same_size_edit, "fields.nc"),
        (_file_became_folder, "fields.nc"),
        (_hidden_file, r"\.mine"),
        (_symlink, "link"),
        (_marker_removed, "fields.nc"),
        (_listed_file_missing, r"fields.nc \(missing\)"),
    ],
)
def test_changed_output_folder_is_refused(small_run, capsys, change, named):
    scenario_dir, out = small_run
    change(out)
    before = _snapshot(scenario_dir)
    assert _run(scenario_dir / "scenario.toml", out) == 2
    _one_line(
        capsys,
        rf"--out folder .*out holds files crustflow did not write.*{named}.*"
        r"choose a new or empty --out folder",
    )
    assert _snapshot(scenario_dir) == before


def test_foreign_run_json_does_not_make_a_folder_ours(scenario_dir, capsys):
    # the first case of the issue: another program's run.json beside a user's spreadsheet
    out = scenario_dir / "out"
    _foreign_manifest(out)
    before = _snapshot(scenario_dir)
    assert _run(scenario_dir / "scenario.toml", out) == 2
    _one_line(capsys, r"did not write .*run.json, thesis_results.xlsx")
    assert _snapshot(scenario_dir) == before


def test_refused_before_any_work(scenario_dir, capsys, monkeypatch):
    import crustflow.commands.run as run_command

    out = scenario_dir / "out"
    out.mkdir()
    (out / "data.csv").write_text("1")
    monkeypatch.setattr(run_command, "run_strips", lambda *a, **k: pytest.fail("work started"))
    assert _run(scenario_dir / "scenario.toml", out) == 2
    _one_line(capsys, "data.csv")


@pytest.mark.parametrize("command", ["run", "ensemble", "profile", "budget"])
def test_scenario_file_inside_out_is_refused_for_every_command(small_run, capsys, command):
    # the second case of the issue: the scenario file copied into the output folder
    scenario_dir, out = small_run
    text = (scenario_dir / "scenario.toml").read_text()
    text = text.replace('"topo.tif"', f'"{scenario_dir / "topo.tif"}"')
    text = text.replace('"crust.tif"', f'"{scenario_dir / "crust.tif"}"')
    text += "[ensemble]\nmembers = 4\nseed = 1\n[ensemble.vary]\n"
    text += '"channel.viscosity" = { distribution = "log-uniform", low = "1e18 Pa*s", '
    text += 'high = "1e20 Pa*s" }\n'
    scenario = out / "scenario.toml"
    scenario.write_text(text)
    (scenario_dir / "line.geojson").write_text(_LINE)
    extra = {
        "run": [],
        "ensemble": [],
        "profile": ["--at", "420000", "5100000"],
        "budget": ["--sections", str(scenario_dir / "line.geojson"), "--run", str(out)],
    }[command]
    before = _snapshot(scenario_dir)
    status = main([command, str(scenario), "--out", str(out), "--quiet", *extra])
    assert status == 2
    _one_line(
        capsys,
        r"output folder .*out holds the input .*(scenario.toml|fields.nc|run.json); "
        "choose another --out folder",
    )
    assert _snapshot(scenario_dir) == before


_LINE = (
    '{"type": "FeatureCollection", "crs": {"type": "name", "properties": {"name": '
    '"urn:ogc:def:crs:EPSG::32633"}}, "features": [{"type": "Feature", "properties": {"name": '
    '"cut"}, "geometry": {"type": "LineString", "coordinates": [[380000, 5100000], '
    "[460000, 5100000]]}}]}"
)


def test_budget_into_the_run_it_reads_is_refused(small_run, capsys):
    scenario_dir, out = small_run
    (scenario_dir / "line.geojson").write_text(_LINE)
    before = _snapshot(scenario_dir)
    args = ["budget", str(scenario_dir / "scenario.toml"), "--sections"]
    args += [str(scenario_dir / "line.geojson"), "--run", str(out), "--out", str(out)]
    assert main(args) == 2
    _one_line(capsys, r"holds the input .*out/(fields.nc|run.json)")
    assert _snapshot(scenario_dir) == before


def test_out_under_a_file_is_refused(scenario_dir, capsys):
    before = _snapshot(scenario_dir)
    assert _run(scenario_dir / "scenario.toml", scenario_dir / "scenario.toml" / "out") == 2
    _one_line(capsys, "is a file, not a folder")
    assert _snapshot(scenario_dir) == before


def test_check_out_dir_accepts_new_and_empty_folders(tmp_path):
    check_out_dir(tmp_path / "new", [])
    (tmp_path / "empty").mkdir()
    check_out_dir(tmp_path / "empty", [])
    with pytest.raises(CrustflowInputError, match=r"holds the input .*a.tif"):
        check_out_dir(tmp_path, [tmp_path / "sub" / "a.tif"])


def test_file_added_during_the_run_is_kept(tmp_path):
    out = tmp_path / "out"
    with atomic_folder(out) as tmp:
        (tmp / "a.txt").write_text("a")
        write_manifest(tmp, {}, ["a.txt"])
    with pytest.raises(CrustflowInputError, match="changed during the run .*late.txt"):
        with atomic_folder(out) as tmp:
            (out / "late.txt").write_text("the user's")
            write_manifest(tmp, {}, [])
    assert (out / "late.txt").read_text() == "the user's" and (out / "a.txt").exists()
    assert not list(tmp_path.glob(".out.partial-*"))


# ---------------------------------------------------------------------------------------------
# parents created for --out, and partial folders


def test_parents_created_for_out_are_removed_on_failure(scenario_dir, capsys):
    (scenario_dir / "bad.tif").write_bytes(b"II*\x00 not really a tiff")
    text = (scenario_dir / "scenario.toml").read_text().replace("crust.tif", "bad.tif")
    (scenario_dir / "bad.toml").write_text(text)
    before = _snapshot(scenario_dir)
    out = scenario_dir / "new" / "deeper" / "out"
    assert _run(scenario_dir / "bad.toml", out) == 2
    _one_line(capsys, "bad.tif")
    assert not (scenario_dir / "new").exists()
    assert _snapshot(scenario_dir) == before


def test_parents_created_for_out_are_removed_when_the_block_fails(tmp_path):
    (tmp_path / "kept").mkdir()
    with pytest.raises(RuntimeError, match="boom"):
        with atomic_folder(tmp_path / "kept" / "new" / "deeper" / "out") as tmp:
            assert tmp.parent == tmp_path / "kept" / "new" / "deeper"
            raise RuntimeError("boom")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["kept"]
    assert list((tmp_path / "kept").iterdir()) == []


def _partial(parent, name, marker):
    folder = parent / name
    folder.mkdir()
    (folder / "fields.nc").write_bytes(b"half written")
    if marker is not None:
        (folder / PARTIAL_MARKER).write_text(json.dumps(marker))
    return folder


def _dead_pid():
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid  # finished and reaped: no such process (unless the pid was reused at once)


def test_stale_partial_of_a_killed_run_is_cleaned_and_others_are_left(small_run, capsys):
    scenario_dir, out = small_run
    host = socket.gethostname()
    stale = _partial(
        scenario_dir, ".out.partial-dead", {OWNER_KEY: 1, "pid": _dead_pid(), "host": host}
    )
    alive = _partial(
        scenario_dir, ".out.partial-alive", {OWNER_KEY: 1, "pid": os.getpid(), "host": host}
    )
    unmarked = _partial(scenario_dir, ".out.partial-unmarked", None)
    elsewhere = _partial(
        scenario_dir, ".out.partial-other", {OWNER_KEY: 1, "pid": 1, "host": host + "-other"}
    )
    other_name = _partial(
        scenario_dir, ".other.partial-dead", {OWNER_KEY: 1, "pid": _dead_pid(), "host": host}
    )
    assert stale_partials(out) == [stale]
    assert _run(scenario_dir / "scenario.toml", out) == 0
    assert not stale.exists()
    for kept in (alive, unmarked, elsewhere, other_name):
        assert (kept / "fields.nc").read_bytes() == b"half written"
