"""Tests for bos.store: result files, CSV export, profiles.

Outside oracles: xarray + h5netcdf and plain h5py read what we write (the
file must look like netCDF4/CF to them), numpy reads the CSV back, Python's
hashlib gives the SHA-256 of known bytes (FIPS 180-4 test vector "abc",
from memory), and bilinear interpolation of a linear field is exact
(analytic).
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import h5py
import numpy as np
import pytest

from bos.errors import DataFileError, InputError
from bos.store import (
    CF_STANDARD_NAMES,
    export_csv,
    export_profile_csv,
    file_sha256,
    profile,
    read_result,
    write_result,
)

Y = np.linspace(-0.02, 0.02, 9)  # object-plane metres, y down
X = np.linspace(-0.03, 0.03, 13)


def _fields():
    yy, xx = np.meshgrid(Y, X, indexing="ij")
    temp = 300.0 + 1000.0 * xx - 500.0 * yy  # linear in x and y [K]
    temp[4, 6] = np.nan
    masked = np.zeros(temp.shape, bool)
    masked[0, :3] = True
    invalid = np.zeros(temp.shape, bool)
    invalid[4, 6] = True
    return temp, masked, invalid


def _write(path, **over):
    temp, masked, invalid = _fields()
    coords = {
        "y": (Y, {"units": "m", "long_name": "object-plane y (down)", "positive": "down"}),
        "x": (X, {"units": "m", "long_name": "object-plane x"}),
        "row_px": {"dims": ("y",), "data": np.arange(9.0) * 16 + 8, "attrs": {"units": "px", "long_name": "row"}},
    }
    variables = {
        "temperature": (("y", "x"), temp, {"units": "K", "long_name": "gas temperature",
                                           "standard_name": CF_STANDARD_NAMES["temperature"]}),
        "density": (("y", "x"), 353.0 / temp, {"units": "kg m-3", "long_name": "gas density",
                                               "standard_name": None}),
        "masked": (("y", "x"), masked, {"units": "1", "long_name": "user mask", "flag_meanings": "measured masked"}),
        "invalid": {"dims": ("y", "x"), "data": invalid, "attrs": {"units": "1", "long_name": "rejected"}},
    }
    attrs = {
        "title": "unit test",
        "software_version": "0.1.0",
        "rig": {"focal_length_m": 0.05, "z_d_m": 0.4, "sensor_px": [480, 640]},
        "medium": {"gas": "air", "pressure_pa": 101325.0},
        "processing": {"method": "correlation", "passes": [64, 32], "subpixel": True, "options": None},
        "input_sha256": {"reference": "ab" * 32},
        "cautions": ["hot surface", "laser class 2"],
        "exif": {},
    }
    kw = {"coords": coords, "variables": variables, "attrs": attrs}
    kw.update(over)
    return write_result(path, **kw)


def test_xarray_h5netcdf_opens_with_units_coords_flags(tmp_path):
    import xarray as xr

    path = _write(tmp_path / "r.h5")
    temp, masked, invalid = _fields()
    with xr.open_dataset(path, engine="h5netcdf") as ds:
        assert set(ds.data_vars) == {"temperature", "density", "masked", "invalid"}
        np.testing.assert_array_equal(ds["y"].values, Y)
        np.testing.assert_array_equal(ds["x"].values, X)
        assert ds["temperature"].dims == ("y", "x")
        assert "row_px" in ds.coords and ds["row_px"].dims == ("y",)
        for name in list(ds.data_vars) + list(ds.coords):
            assert ds[name].attrs["units"] and ds[name].attrs["long_name"], name
        assert ds["temperature"].attrs["standard_name"] == "air_temperature"  # CF standard-name table
        assert "standard_name" not in ds["density"].attrs  # None -> left out (e.g. a gas other than air)
        np.testing.assert_array_equal(ds["temperature"].values, temp)  # NaN kept in place
        assert ds["masked"].dtype == np.uint8
        np.testing.assert_array_equal(ds["masked"].values, masked.astype(np.uint8))
        np.testing.assert_array_equal(ds["masked"].attrs["flag_values"], [0, 1])
        assert ds["masked"].attrs["flag_meanings"] == "measured masked"
        assert ds["invalid"].attrs["flag_meanings"] == "false true"
        assert ds.attrs["rig.focal_length_m"] == 0.05
        assert ds.attrs["input_sha256.reference"] == "ab" * 32
        np.testing.assert_array_equal(ds.attrs["rig.sensor_px"], [480, 640])
        assert ds.attrs["Conventions"].startswith("CF-")
        # the selection along a coordinate works as for any netCDF file
        assert float(ds["temperature"].sel(y=Y[2], x=X[1])) == pytest.approx(300 + 1000 * X[1] - 500 * Y[2])
    # plain h5py: coordinates are HDF5 dimension scales attached to the fields
    with h5py.File(path, "r") as h5:
        assert h5["temperature"].dims[0][0].name == "/y"
        assert h5["temperature"].dims[1][0].name == "/x"
        assert h5["y"].is_scale


def test_round_trip(tmp_path):
    path = _write(tmp_path / "r.h5")
    r = read_result(path)
    temp, masked, invalid = _fields()
    assert set(r.coords) == {"y", "x", "row_px"}
    assert set(r.variables) == {"temperature", "density", "masked", "invalid"}
    np.testing.assert_array_equal(r["temperature"].data, temp)
    assert r["masked"].data.dtype == bool
    np.testing.assert_array_equal(r["masked"].data, masked)
    np.testing.assert_array_equal(r["invalid"].data, invalid)
    assert r["temperature"].attrs["units"] == "K" and r["temperature"].dims == ("y", "x")
    assert r.attrs["rig"]["z_d_m"] == 0.4
    assert r.attrs["processing"] == {"method": "correlation", "passes": pytest.approx([64, 32]),
                                     "subpixel": True, "options": None}
    assert r.attrs["cautions"] == ["hot surface", "laser class 2"]
    assert r.attrs["medium"] == {"gas": "air", "pressure_pa": 101325.0}
    assert r.attrs["exif"] == {}
    # what was read can be written again unchanged
    path2 = write_result(tmp_path / "again.h5", coords=r.coords, variables=r.variables, attrs=r.attrs)
    r2 = read_result(path2)
    np.testing.assert_array_equal(r2["masked"].data, masked)
    assert r2.attrs == r.attrs | {"processing": r2.attrs["processing"], "rig": r2.attrs["rig"]}
    np.testing.assert_array_equal(r2.attrs["rig"]["sensor_px"], [480, 640])


def test_refuses_missing_units_and_bad_shapes(tmp_path):
    temp, _, _ = _fields()
    with pytest.raises(InputError, match="'temperature' has no 'units'"):
        _write(tmp_path / "a.h5", variables={"temperature": (("y", "x"), temp, {"long_name": "T"})})
    with pytest.raises(InputError, match="no 'long_name'"):
        _write(tmp_path / "a.h5", variables={"t": (("y", "x"), temp, {"units": "K"})})
    with pytest.raises(InputError, match="has 9 points along 'x', coordinate has 13"):
        _write(tmp_path / "a.h5", variables={"t": (("x", "y"), temp, {"units": "K", "long_name": "T"})})
    with pytest.raises(InputError, match="dimension 'z' that has no coordinate"):
        _write(tmp_path / "a.h5", variables={"t": (("y", "z"), temp, {"units": "K", "long_name": "T"})})
    assert not list(tmp_path.iterdir())


def test_atomic_write_crash_leaves_nothing_and_keeps_old_file(tmp_path, monkeypatch):
    path = _write(tmp_path / "r.h5")
    before = path.read_bytes()
    calls = {"n": 0}
    original = h5py.Group.create_dataset

    def crashing(self, *args, **kwargs):
        calls["n"] += 1
        if calls["n"] == 3:
            raise RuntimeError("simulated crash in the middle of writing")
        return original(self, *args, **kwargs)

    monkeypatch.setattr(h5py.Group, "create_dataset", crashing)
    with pytest.raises(RuntimeError, match="simulated crash"):
        _write(path)
    with pytest.raises(RuntimeError, match="simulated crash"):
        calls["n"] = 0
        _write(tmp_path / "new.h5")
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r.h5"]  # no temp or partial file


def test_unwritable_or_missing_directory(tmp_path):
    with pytest.raises(DataFileError, match="does not exist") as e:
        _write(tmp_path / "no" / "such" / "r.h5")
    assert "\n" not in str(e.value)
    # root ignores permission bits, so use sysfs (refuses file creation even for root) when present
    target = Path("/sys/bos_store_test.h5") if os.geteuid() == 0 else tmp_path / "ro" / "r.h5"
    if os.geteuid() != 0:
        target.parent.mkdir()
        target.parent.chmod(0o555)
    elif not Path("/sys").is_dir():
        pytest.skip("running as root without /sys: no directory that refuses writes")
    try:
        with pytest.raises(DataFileError, match="not writable|cannot write") as e:
            _write(target)
        assert "\n" not in str(e.value)
    finally:
        if os.geteuid() != 0:
            target.parent.chmod(0o755)
    assert not target.exists()


def test_read_errors(tmp_path):
    with pytest.raises(DataFileError, match="file not found"):
        read_result(tmp_path / "none.h5")
    (tmp_path / "junk.h5").write_bytes(b"\x00garbage" * 100)
    with pytest.raises(DataFileError, match="not an HDF5 file"):
        read_result(tmp_path / "junk.h5")
    with h5py.File(tmp_path / "other.h5", "w") as h5:
        h5["a"] = np.arange(3)
    with pytest.raises(DataFileError, match="not a bos result file"):
        read_result(tmp_path / "other.h5")
    good = _write(tmp_path / "r.h5").read_bytes()
    (tmp_path / "cut.h5").write_bytes(good[: len(good) // 2])  # truncated file
    with pytest.raises(DataFileError, match="cannot read result file") as e:
        read_result(tmp_path / "cut.h5")
    assert "\n" not in str(e.value)


def test_file_sha256(tmp_path):
    (tmp_path / "abc.bin").write_bytes(b"abc")
    # FIPS 180-4 example "abc" (from memory), cross-checked with hashlib
    assert file_sha256(tmp_path / "abc.bin") == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    big = np.random.default_rng(0).bytes(3_000_000)  # spans several read blocks
    (tmp_path / "big.bin").write_bytes(big)
    assert file_sha256(tmp_path / "big.bin") == hashlib.sha256(big).hexdigest()
    with pytest.raises(DataFileError, match="file not found"):
        file_sha256(tmp_path / "nope")


def test_csv_long_format_reads_back_with_numpy(tmp_path):
    r = read_result(_write(tmp_path / "r.h5"))
    out = export_csv(tmp_path / "f.csv", r, variables=["temperature", "masked"])
    table = np.genfromtxt(out, delimiter=",", names=True)
    assert table.dtype.names == ("y_m", "x_m", "temperature", "masked")
    yy, xx = np.meshgrid(Y, X, indexing="ij")
    temp, masked, _ = _fields()
    np.testing.assert_allclose(table["y_m"], yy.ravel(), rtol=1e-9)
    np.testing.assert_allclose(table["x_m"], xx.ravel(), rtol=1e-9)
    np.testing.assert_allclose(table["temperature"], temp.ravel(), rtol=1e-9)  # NaN at the same place
    np.testing.assert_array_equal(table["masked"], masked.ravel().astype(float))
    default = np.genfromtxt(export_csv(tmp_path / "all.csv", r), delimiter=",", names=True)
    assert set(default.dtype.names) == {"y_m", "x_m", "temperature", "density", "masked", "invalid"}
    with pytest.raises(InputError, match="no variable 'pressure'"):
        export_csv(tmp_path / "x.csv", r, variables=["pressure"])


def test_profile_of_linear_field_is_exact_and_nan_aware(tmp_path):
    r = read_result(_write(tmp_path / "r.h5"))
    # line from (x, y) = (-0.025, 0.015) to (0.028, -0.018) avoiding the NaN node at (x=0, y=0)
    prof = profile(r, "temperature", start=(-0.025, 0.015), end=(0.028, -0.018), n=41)
    truth = 300.0 + 1000.0 * prof.x_m - 500.0 * prof.y_m  # analytic: bilinear is exact for linear fields
    finite = np.isfinite(prof.values)
    # the samples in the four cells around the NaN node are NaN, everything else exact
    near = (np.abs(prof.x_m) < X[1] - X[0]) & (np.abs(prof.y_m) < Y[1] - Y[0])
    np.testing.assert_array_equal(~finite, near)
    np.testing.assert_allclose(prof.values[finite], truth[finite], rtol=0, atol=1e-9)
    assert prof.s_m[-1] == pytest.approx(np.hypot(0.053, 0.033)) and prof.units == "K"
    # a line along the top row misses the NaN entirely; outside the grid -> NaN
    top = profile(r, "temperature", start=(-0.03, -0.02), end=(0.04, -0.02))
    inside = top.x_m <= 0.03 + 1e-12
    np.testing.assert_allclose(top.values[inside], 300 + 1000 * top.x_m[inside] + 10, atol=1e-9)
    assert np.all(np.isnan(top.values[~inside]))
    out = export_profile_csv(tmp_path / "p.csv", prof)
    back = np.genfromtxt(out, delimiter=",", names=True)
    assert back.dtype.names == ("s_m", "x_m", "y_m", "temperature")
    np.testing.assert_allclose(back["temperature"], prof.values, rtol=1e-9)
    with pytest.raises(InputError, match="n >= 2"):
        profile(r, "temperature", start=(0, 0), end=(0.01, 0), n=1)
