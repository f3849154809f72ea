"""``[output] compression``: every codec writes the same numbers (write, then read back)."""

from __future__ import annotations

import numpy as np
import pytest
import rasterio
import xarray as xr
from affine import Affine
from conftest import SCENARIO

from crustflow.cli import main
from crustflow.errors import CrustflowInputError
from crustflow.io import writers
from crustflow.scenario.document import load_scenario


def _run(folder, compression: str | None) -> xr.Dataset:
    table = "" if compression is None else f'[output]\ncompression = "{compression}"\n'
    path = folder / f"{compression}.toml"
    path.write_text(SCENARIO + table)
    out = folder / f"out_{compression}"
    assert main(["run", str(path), "--out", str(out), "--quiet", "--strip-rows", "8"]) == 0
    return out


@pytest.mark.parametrize("compression", ["zstd", "lerc_zstd", "none"])
def test_codecs_are_lossless(scenario_dir, compression):
    # Write-then-read-back: each codec gives the default (DEFLATE) files' values exactly, and
    # GDAL reports the codec asked for (GeoTIFF "COMPRESSION" metadata).
    default = _run(scenario_dir, None)
    other = _run(scenario_dir, compression)
    with xr.open_dataset(default / "fields.nc") as a, xr.open_dataset(other / "fields.nc") as b:
        for name in a.data_vars:
            np.testing.assert_array_equal(a[name].values, b[name].values, err_msg=name)
    for name in ("flux_east", "backflow"):
        with rasterio.open(default / f"{name}.tif") as a, rasterio.open(other / f"{name}.tif") as b:
            np.testing.assert_array_equal(a.read(1), b.read(1))
            assert a.compression.name == "deflate"
            want = None if compression == "none" else compression
            assert (b.compression.name if b.compression else None) == want


@pytest.mark.parametrize("compression", ["deflate", "zstd", "lerc_zstd", "none"])
def test_cloud_optimised_geotiffs_keep_the_codec(tmp_path, compression):
    # writers.to_cog rewrites with the scenario's codec: GDAL reports the COG layout and the codec
    # asked for, and the values read back unchanged (write-then-read-back, lossless codecs).
    values = np.linspace(-3.0, 7.0, 96 * 80, dtype="float32").reshape(96, 80)
    path = tmp_path / "v.tif"
    profile = dict(driver="GTiff", width=80, height=96, count=1, dtype="float32", crs="EPSG:32625")
    profile["transform"] = Affine(250.0, 0.0, 500_000.0, 0.0, -250.0, 5_000_000.0)
    with rasterio.open(path, "w", tiled=True, blockxsize=64, blockysize=64, **profile) as dst:
        dst.write(values, 1)
    writers.to_cog(path, compression)
    with rasterio.open(path) as src:
        np.testing.assert_array_equal(src.read(1), values)
        assert src.tags(ns="IMAGE_STRUCTURE")["LAYOUT"] == "COG"
        want = None if compression == "none" else compression
        assert (src.compression.name if src.compression else None) == want


def test_unknown_codec_is_refused(scenario_dir):
    (scenario_dir / "bad.toml").write_text(SCENARIO + '[output]\ncompression = "lzma"\n')
    with pytest.raises(CrustflowInputError, match=r"output.compression is 'lzma'; give one of"):
        load_scenario(scenario_dir / "bad.toml")


def test_codec_missing_from_the_build_names_the_fix(scenario_dir, monkeypatch):
    monkeypatch.setattr(writers, "_gdal_writes", lambda codec: False)
    with pytest.raises(CrustflowInputError, match=r"this GDAL build cannot write it in GeoTIFF"):
        writers.check_compression("zstd", ("geotiff",))
    monkeypatch.setattr(writers, "_netcdf_writes_zstd", lambda: False)
    with pytest.raises(CrustflowInputError, match=r"netCDF4 build has no ZSTD filter"):
        writers.check_compression("zstd", ("netcdf",))
    writers.check_compression("deflate", ("netcdf", "geotiff"))  # always available
