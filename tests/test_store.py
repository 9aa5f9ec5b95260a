"""Tests for bos.store: result files, safe reading, CSV export, profiles.

Outside oracles: xarray + h5netcdf, netCDF4-python (netCDF-C) and plain
h5py read what we write (the file must look like netCDF-4/CF to them),
numpy reads the CSV back, Python's json module parses the attributes,
Python's hashlib gives the SHA-256 of known bytes (FIPS 180-4 test vector
"abc", from memory), and bilinear interpolation of a linear field is exact
(analytic).
"""

from __future__ import annotations

import hashlib
import io
import json
import os
from pathlib import Path

import h5py
import numpy as np
import pytest

import bos
from bos.errors import DataFileError, InputError
from bos.store import (
    CF_STANDARD_NAMES,
    export_csv,
    export_profile_csv,
    file_sha256,
    open_result,
    profile,
    read_result,
    write_result,
)

Y = np.linspace(0.02, -0.02, 9)  # object-plane metres, y up: decreasing with the row, as bos run writes it
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


ATTRS = {
    "title": "unit test",
    "software_version": "0.1.0",
    "rig": {"focal_length_m": 0.05, "z_d_m": 0.4, "sensor_px": [480, 640]},
    "medium": {"gas": "air", "pressure_pa": 101325.0},
    "processing": {"method": "correlation", "passes": [64, 32], "subpixel": True, "options": None},
    "input_sha256": {"reference": "ab" * 32},
    "cautions": ["hot surface", "laser class 2"],
    "exif": {},
    "profile_line_m": [0.0, 0.01, 0.02, -0.01],
}


def _write(path, **over):
    temp, masked, invalid = _fields()
    coords = {
        "y": (Y, {"units": "m", "long_name": "object-plane y (up)", "axis": "Y"}),
        "x": (X, {"units": "m", "long_name": "object-plane x", "axis": "X"}),
        "row_px": {"dims": ("y",), "data": np.arange(9.0) * 16 + 8,
                   "attrs": {"units": "1", "long_name": "row", "display_units": "px"}},
    }
    variables = {
        "temperature": (("y", "x"), temp, {"units": "K", "long_name": "gas temperature",
                                           "standard_name": CF_STANDARD_NAMES["temperature"]}),
        "density": (("y", "x"), 353.0 / temp, {"units": "kg m-3", "long_name": "gas density",
                                               "standard_name": None}),
        "masked": (("y", "x"), masked, {"units": "1", "long_name": "user mask", "flag_meanings": "measured masked"}),
        "invalid": {"dims": ("y", "x"), "data": invalid, "attrs": {"units": "1", "long_name": "rejected"}},
    }
    kw = {"coords": coords, "variables": variables, "attrs": dict(ATTRS)}
    kw.update(over)
    return write_result(path, **kw)


def test_xarray_and_netcdf_c_open_with_units_coords_flags(tmp_path):
    import xarray as xr

    path = _write(tmp_path / "r.nc")
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
        # CF 1.8 section 2.2 has no unsigned types: flags are signed bytes with flag_values/flag_meanings
        assert ds["masked"].dtype == np.int8
        np.testing.assert_array_equal(ds["masked"].values, masked.astype(np.int8))
        assert ds["masked"].attrs["flag_values"].dtype == np.int8
        np.testing.assert_array_equal(ds["masked"].attrs["flag_values"], [0, 1])
        assert ds["masked"].attrs["flag_meanings"] == "measured masked"
        assert ds["invalid"].attrs["flag_meanings"] == "false true"
        # nested provenance: one JSON attribute per key, no dotted names (CF 1.8 section 2.3)
        assert not [k for k in ds.attrs if "." in k]
        assert json.loads(ds.attrs["rig"]) == ATTRS["rig"]
        assert json.loads(ds.attrs["processing"])["options"] is None
        assert set(ds.attrs["bos_json_attributes"].split()) == {"rig", "medium", "processing", "input_sha256",
                                                                "cautions", "exif"}
        np.testing.assert_array_equal(ds.attrs["profile_line_m"], ATTRS["profile_line_m"])  # numeric stays numeric
        assert ds.attrs["Conventions"] == "CF-1.8"
        assert ds.attrs["history"].endswith(f"written by bos.store.write_result (bos-toolkit {bos.__version__})")
        assert float(ds["temperature"].sel(y=Y[2], x=X[1])) == pytest.approx(300 + 1000 * X[1] - 500 * Y[2])
    # plain h5py: coordinates are HDF5 dimension scales attached to the fields
    with h5py.File(path, "r") as h5:
        assert h5["temperature"].dims[0][0].name == "/y"
        assert h5["temperature"].dims[1][0].name == "/x"
        assert h5["y"].is_scale
    netCDF4 = pytest.importorskip("netCDF4")  # the netCDF-C library
    with netCDF4.Dataset(path) as nc:
        assert nc.data_model == "NETCDF4"
        assert nc["temperature"].dimensions == ("y", "x") and nc["temperature"].units == "K"
        assert nc["masked"].dtype == np.int8


def test_round_trip_and_open_result(tmp_path):
    path = _write(tmp_path / "r.nc")
    r = read_result(path)
    temp, masked, invalid = _fields()
    assert set(r.coords) == {"y", "x", "row_px"}
    assert set(r.variables) == {"temperature", "density", "masked", "invalid"}
    np.testing.assert_array_equal(r["temperature"].data, temp)
    assert r["masked"].data.dtype == bool
    np.testing.assert_array_equal(r["masked"].data, masked)
    np.testing.assert_array_equal(r["invalid"].data, invalid)
    assert r["temperature"].attrs["units"] == "K" and r["temperature"].dims == ("y", "x")
    assert not any(k.startswith("_Netcdf4") for k in r["temperature"].attrs)
    for key in ("rig", "medium", "processing", "input_sha256", "cautions", "exif"):
        assert r.attrs[key] == ATTRS[key], key
    # what was read can be written again; history grows by one line
    path2 = write_result(tmp_path / "again.nc", coords=r.coords, variables=r.variables, attrs=r.attrs,
                         history="copied by the test")
    r2 = read_result(path2)
    np.testing.assert_array_equal(r2["masked"].data, masked)
    lines = r2.attrs["history"].splitlines()
    assert len(lines) == 2 and "copied by the test" in lines[0] and "write_result" in lines[1]
    assert {k: v for k, v in r2.attrs.items() if k not in ("history", "profile_line_m")} == \
           {k: v for k, v in r.attrs.items() if k not in ("history", "profile_line_m")}
    # xarray view: flags decoded to bool, provenance restored as dicts
    ds = open_result(path)
    assert ds["masked"].dtype == bool and ds["invalid"].dtype == bool
    np.testing.assert_array_equal(ds["masked"].values, masked)
    assert ds.attrs["rig"] == ATTRS["rig"] and ds.attrs["cautions"] == ATTRS["cautions"]
    assert ds.attrs["processing"]["subpixel"] is True and "bos_json_attributes" not in ds.attrs
    np.testing.assert_array_equal(ds["temperature"].values, temp)
    assert ds["row_px"].attrs["display_units"] == "px"
    os.remove(path)  # the dataset is in memory and the file closed
    assert float(ds["temperature"][0, 0]) == pytest.approx(temp[0, 0])


def test_refuses_missing_units_bad_shapes_and_names(tmp_path):
    temp, _, _ = _fields()
    with pytest.raises(InputError, match="'temperature' has no 'units'"):
        _write(tmp_path / "a.nc", variables={"temperature": (("y", "x"), temp, {"long_name": "T"})})
    with pytest.raises(InputError, match="no 'long_name'"):
        _write(tmp_path / "a.nc", variables={"t": (("y", "x"), temp, {"units": "K"})})
    with pytest.raises(InputError, match="has 9 points along 'x', coordinate has 13"):
        _write(tmp_path / "a.nc", variables={"t": (("x", "y"), temp, {"units": "K", "long_name": "T"})})
    with pytest.raises(InputError, match="dimension 'z' that has no coordinate"):
        _write(tmp_path / "a.nc", variables={"t": (("y", "z"), temp, {"units": "K", "long_name": "T"})})
    # CF 1.8 section 2.3: letters, digits and underscores, starting with a letter
    with pytest.raises(InputError, match="CF 1.8 section 2.3"):
        _write(tmp_path / "a.nc", attrs={"rig.focal_length_m": 0.05})
    with pytest.raises(InputError, match="CF 1.8 section 2.3"):
        _write(tmp_path / "a.nc", variables={"2t": (("y", "x"), temp, {"units": "K", "long_name": "T"})})
    assert not list(tmp_path.iterdir())


def test_atomic_write_crash_leaves_nothing_and_keeps_old_file(tmp_path, monkeypatch):
    path = _write(tmp_path / "r.nc")
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
        _write(tmp_path / "new.nc")
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r.nc"]  # no temp or partial file


def test_unwritable_or_missing_directory(tmp_path):
    with pytest.raises(DataFileError, match="does not exist") as e:
        _write(tmp_path / "no" / "such" / "r.nc")
    assert "\n" not in str(e.value)
    # root ignores permission bits, so use sysfs (refuses file creation even for root) when present
    target = Path("/sys/bos_store_test.nc") if os.geteuid() == 0 else tmp_path / "ro" / "r.nc"
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
    for reader in (read_result, open_result):
        with pytest.raises(DataFileError, match="file not found"):
            reader(tmp_path / "none.nc")
        (tmp_path / "junk.nc").write_bytes(b"\x00garbage" * 100)
        with pytest.raises(DataFileError, match="not an HDF5"):
            reader(tmp_path / "junk.nc")
        with h5py.File(tmp_path / "other.nc", "w") as h5:
            h5["a"] = np.arange(3)
        with pytest.raises(DataFileError, match="not a bos result file"):
            reader(tmp_path / "other.nc")
        good = _write(tmp_path / "r.nc").read_bytes()
        (tmp_path / "cut.nc").write_bytes(good[: len(good) // 2])  # truncated file
        with pytest.raises(DataFileError, match="cannot read result file") as e:
            reader(tmp_path / "cut.nc")
        assert "\n" not in str(e.value)


def test_malformed_json_attribute_is_a_data_file_error(tmp_path):
    path = _write(tmp_path / "r.nc")
    with h5py.File(path, "r+") as h5:
        h5.attrs["rig"] = '{"focal_length_m": 0.05,'  # cut short by hand editing
    for reader in (read_result, open_result):
        with pytest.raises(DataFileError, match="attribute 'rig' is not valid JSON") as e:
            reader(path)
        assert "\n" not in str(e.value)


def test_format_1_files_still_read(tmp_path):
    # files of the first format: dotted attribute names, JSON list of the JSON-encoded names
    path = tmp_path / "old.h5"
    with h5py.File(path, "w") as h5:
        y = h5.create_dataset("y", data=np.array([0.0, 0.1]))
        y.make_scale("y")
        y.attrs["units"], y.attrs["long_name"] = "m", "y"
        m = h5.create_dataset("masked", data=np.array([0, 1], np.uint8))
        m.dims[0].attach_scale(y)
        m.attrs["flag_values"] = np.array([0, 1], np.uint8)
        h5.attrs["bos_file_format"] = "bos-toolkit result 1"
        h5.attrs["rig.focal_length_m"] = 0.05
        h5.attrs["cautions"] = '["hot"]'
        h5.attrs["bos_json_attributes"] = '["cautions"]'
    r = read_result(path)
    assert r.attrs["rig"] == {"focal_length_m": 0.05} and r.attrs["cautions"] == ["hot"]
    np.testing.assert_array_equal(r["masked"].data, [False, True])
    assert open_result(path).attrs["rig"] == {"focal_length_m": 0.05}


def _result_file_with(tmp_path, name, build):
    path = _write(tmp_path / name)
    with h5py.File(path, "r+") as h5:
        build(h5, tmp_path)
    return path


def test_refuses_files_that_reach_outside_themselves(tmp_path):
    secret = tmp_path / "secret.bin"
    secret.write_bytes(np.arange(16, dtype=np.float64).tobytes())  # any readable local file

    def external_storage(h5, d):
        h5.create_dataset("leak", shape=(16,), dtype="f8", external=[(str(secret), 0, 128)])

    def external_link(h5, d):
        with h5py.File(d / "other.h5", "w") as o:
            o["data"] = np.arange(4.0)
        h5["linked"] = h5py.ExternalLink(str(d / "other.h5"), "/data")

    def virtual(h5, d):
        layout = h5py.VirtualLayout(shape=(4,), dtype="f8")
        layout[:] = h5py.VirtualSource(str(d / "other.h5"), "data", shape=(4,))
        h5.create_virtual_dataset("virt", layout)

    cases = {"external file": external_storage, "external link": external_link, "virtual dataset": virtual}
    for what, build in cases.items():
        path = _result_file_with(tmp_path, f"{what.replace(' ', '_')}.nc", build)
        for reader in (read_result, open_result):
            with pytest.raises(DataFileError, match=f"refusing .*{what.split()[-1]}") as e:
                reader(path)
            assert "\n" not in str(e.value), what


def test_caps_what_a_reader_allocates(tmp_path):
    def huge(h5, d):  # 10^12 float64 declared, nothing written: a few kB on disk
        h5.create_dataset("bomb", shape=(10**6, 10**6), dtype="f8", chunks=(1000, 1000), compression="gzip")

    path = _result_file_with(tmp_path, "bomb.nc", huge)
    assert path.stat().st_size < 1e6
    for reader in (read_result, open_result):
        with pytest.raises(DataFileError, match="dataset /bomb declares .* more than the 2.15 GB") as e:
            reader(path)
        assert "\n" not in str(e.value)
    small = _write(tmp_path / "r.nc")  # 9 x 13 float64 fields: ~3.7 kB of arrays in all
    with pytest.raises(DataFileError, match="more than the 1e-06 GB"):
        read_result(small, max_bytes=1000)
    assert read_result(small, max_bytes=10_000)["temperature"].data.shape == (9, 13)


def test_file_sha256(tmp_path):
    (tmp_path / "abc.bin").write_bytes(b"abc")
    # FIPS 180-4 example "abc" (from memory), cross-checked with hashlib
    assert file_sha256(tmp_path / "abc.bin") == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    big = np.random.default_rng(0).bytes(3_000_000)  # spans several read blocks
    (tmp_path / "big.bin").write_bytes(big)
    assert file_sha256(tmp_path / "big.bin") == hashlib.sha256(big).hexdigest()
    with pytest.raises(DataFileError, match="file not found"):
        file_sha256(tmp_path / "nope")


def test_csv_long_format_with_units_reads_back_with_numpy(tmp_path):
    r = read_result(_write(tmp_path / "r.nc"))
    out = export_csv(tmp_path / "f.csv", r, variables=["temperature", "masked", "density"])
    assert out.read_text().splitlines()[0] == "y [m],x [m],temperature [K],masked [1],density [kg m-3]"
    table = np.genfromtxt(out, delimiter=",", names=True)  # numpy turns "temperature [K]" into temperature_K
    assert table.dtype.names == ("y_m", "x_m", "temperature_K", "masked_1", "density_kg_m3")
    yy, xx = np.meshgrid(Y, X, indexing="ij")
    temp, masked, _ = _fields()
    np.testing.assert_allclose(table["y_m"], yy.ravel(), rtol=1e-9)
    np.testing.assert_allclose(table["x_m"], xx.ravel(), rtol=1e-9)
    np.testing.assert_allclose(table["temperature_K"], temp.ravel(), rtol=1e-9)  # NaN at the same place
    np.testing.assert_array_equal(table["masked_1"], masked.ravel().astype(float))
    default = np.genfromtxt(export_csv(tmp_path / "all.csv", r), delimiter=",", names=True)
    assert set(default.dtype.names) == {"y_m", "x_m", "temperature_K", "density_kg_m3", "masked_1", "invalid_1"}
    stream = io.StringIO()
    export_csv(stream, r, variables=["temperature"])
    export_csv(tmp_path / "t.csv", r, variables=["temperature"])
    assert stream.getvalue() == (tmp_path / "t.csv").read_text()  # a stream gets the same text
    with pytest.raises(InputError, match="no variable 'pressure'"):
        export_csv(tmp_path / "x.csv", r, variables=["pressure"])


def test_profile_of_linear_field_is_exact_and_nan_aware(tmp_path):
    r = read_result(_write(tmp_path / "r.nc"))
    # line from (x, y) = (-0.025, 0.015) to (0.028, -0.018) avoiding the NaN node at (x=0, y=0)
    prof = profile(r, "temperature", start=(-0.025, 0.015), end=(0.028, -0.018), n=41)
    truth = 300.0 + 1000.0 * prof.x_m - 500.0 * prof.y_m  # analytic: bilinear is exact for linear fields
    finite = np.isfinite(prof.values)
    # the samples in the four cells around the NaN node are NaN, everything else exact
    near = (np.abs(prof.x_m) < X[1] - X[0]) & (np.abs(prof.y_m) < abs(Y[1] - Y[0]))
    np.testing.assert_array_equal(~finite, near)
    np.testing.assert_allclose(prof.values[finite], truth[finite], rtol=0, atol=1e-9)
    assert prof.s_m[-1] == pytest.approx(np.hypot(0.053, 0.033)) and prof.units == "K"
    # a line along the top row (y = +0.02, the first row: y points up) misses the NaN; outside the grid -> NaN
    top = profile(r, "temperature", start=(-0.03, 0.02), end=(0.04, 0.02))
    inside = top.x_m <= 0.03 + 1e-12
    np.testing.assert_allclose(top.values[inside], 300 + 1000 * top.x_m[inside] - 10, atol=1e-9)
    assert np.all(np.isnan(top.values[~inside]))
    out = export_profile_csv(tmp_path / "p.csv", prof)
    assert out.read_text().splitlines()[0] == "s [m],x [m],y [m],temperature [K]"
    back = np.genfromtxt(out, delimiter=",", names=True)
    np.testing.assert_allclose(back["temperature_K"], prof.values, rtol=1e-9)
    np.testing.assert_allclose(back["y_m"], prof.y_m, rtol=1e-9)
    with pytest.raises(InputError, match="n >= 2"):
        profile(r, "temperature", start=(0, 0), end=(0.01, 0), n=1)


def test_text_variables_and_variables_filled_later(tmp_path):
    """Text as CF character arrays and a series written index by index (fill): netCDF-C, xarray and the
    CF checker read them as written."""
    n = 4
    coords = {"frame": (np.arange(n), {"units": "1", "long_name": "frame"}),
              "y": (Y, {"units": "m", "long_name": "y", "axis": "Y"}), "x": (X, {"units": "m", "long_name": "x"})}
    names = ["a.png", "", "bé.png#3", "a much longer file name.tif"]
    fields = [np.full((Y.size, X.size), 1.5 * i) for i in range(n)]
    variables = {"source_file": (("frame",), np.array(names), {"long_name": "file of the frame"}),
                 "field": {"dims": ("frame", "y", "x"), "shape": (n, Y.size, X.size), "dtype": np.float64,
                           "attrs": {"units": "K", "long_name": "field"}},
                 "flag": {"dims": ("frame", "y", "x"), "shape": (n, Y.size, X.size), "dtype": bool,
                          "attrs": {"units": "1", "long_name": "flag", "flag_meanings": "no yes"}}}

    def fill(write):
        for i in range(n):
            write("field", i, fields[i])
            write("flag", i, fields[i] > 2.0)

    path = write_result(tmp_path / "s.nc", coords=coords, variables=variables, fill=fill)
    r = read_result(path)
    assert r["source_file"].dims == ("frame",) and list(r["source_file"].data) == names
    np.testing.assert_array_equal(r["field"].data, np.stack(fields))
    assert r["flag"].data.dtype == bool and r["flag"].data.sum() == 2 * Y.size * X.size
    assert "source_file_strlen" not in r.coords and "source_file_strlen" not in r.variables
    netCDF4 = pytest.importorskip("netCDF4")
    with netCDF4.Dataset(path) as nc:  # netCDF-C: a char array (NC_CHAR) decoded with _Encoding
        assert nc["source_file"].dtype == np.dtype("S1") and list(nc["source_file"][:]) == names
        assert nc["flag"].dtype == np.int8
    ds = open_result(path)
    assert list(ds.source_file.values) == names and ds.flag.dtype == bool
    with h5py.File(path, "r") as h5:
        assert h5["field"].chunks == (1, Y.size, X.size)
    # a failing fill leaves no file (atomic write)
    def broken(write):
        write("field", 0, fields[0])
        raise InputError("stop")

    with pytest.raises(InputError, match="stop"):
        write_result(tmp_path / "t.nc", coords=coords, variables=variables, fill=broken)
    assert not (tmp_path / "t.nc").exists()
    from test_cf_compliance import assert_cfchecks_clean

    assert_cfchecks_clean([path], tmp_path)
