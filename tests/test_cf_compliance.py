"""Result files written by a real run against the netCDF/CF ecosystem.

Outside oracles (each an independent, general-purpose tool):
* the CF conventions checker ``cfchecks`` (PyPI cfchecker, with the UDUNITS-2
  C library; CF 1.8): 0 errors and 0 warnings;
* the IOOS compliance checker (cf:1.8 suite): nothing but its earth-grid
  heuristic, which takes any coordinate with ``axis = "Y"`` for a latitude
  (see docs/file-format.md);
* cf_xarray finds the X and Y axes; its pint unit registry parses every
  ``units`` string to the physically right dimensionality; pint-xarray
  converts with the right factors;
* matplotlib, through xarray's plain ``.plot()``, draws the first image row
  at the top (the picture upright).

The tables cfchecks needs are read locally: the CF standard-name table that
compliance-checker ships, and empty area-type / region tables (the files
use neither ``area_type`` nor ``region``), so no network is needed.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from bos import config, synthetic
from bos.output import save_run
from bos.stages import inputs_from_arrays, process_inputs
from bos.store import open_result, read_result

xr = pytest.importorskip("xarray")

SHAPE = (96, 128)

EXPERIMENT = """# a small synthetic run
[camera]
focal_length_mm = 50
pixel_pitch_um = 5
f_number = 11

[geometry]
camera_to_object_m = 0.6
object_to_background_m = 0.4
object_width_mm = 30

[medium]
gas = "air"
temperature_k = 293.15

[source]
kind = "{source}"
{frequency}

[processing]
window_px = 32
final_window_px = 16
passes = 2
camera_motion = "none"

[reconstruction]
kind = "{kind}"
reference_region = "{region}"

[output]
directory = "out"
name = "{name}"
figures = false
"""

CASES = {
    # name: (reconstruction kind, reference region, source kind, extra source line)
    "planar": ("planar", "edges", "plume", ""),
    "column": ("axisymmetric", "edges", "plume", ""),
    "sound": ("planar", "edges", "ultrasound", "frequency_hz = 40000"),
    "shift": ("none", "edges", "none", ""),
}


def _pair():
    rows, cols = np.mgrid[0:SHAPE[0], 0:SHAPE[1]].astype(float)
    cy, cx = (SHAPE[0] - 1) / 2, (SHAPE[1] - 1) / 2
    g = np.exp(-((rows - cy) ** 2 + (cols - cx) ** 2) / (2 * 14.0**2))
    # displacement toward the centre, as seen through a hot (diverging-lens) region
    dy, dx = -0.02 * (rows - cy) * g, -0.02 * (cols - cx) * g
    pair = synthetic.render_pair(shape=SHAPE, displacement=(dy, dx), dot_diameter_px=2.8, density=0.55, seed=3,
                                 bit_depth=16, noise=True)
    return pair.reference, pair.measurement


@pytest.fixture(scope="module")
def results(tmp_path_factory):
    d = tmp_path_factory.mktemp("cf")
    ref, meas = _pair()
    files = {}
    for name, (kind, region, source, extra) in CASES.items():
        exp_file = d / f"{name}.toml"
        exp_file.write_text(EXPERIMENT.format(source=source, frequency=extra, kind=kind, region=region, name=name))
        exp = config.load_experiment(exp_file)
        result = process_inputs(inputs_from_arrays(ref, meas), exp)
        files[name] = save_run(result, exp)[0]
    return files


def _checker_tables(tmp_path) -> dict[str, str]:
    """Local copies of the three tables cfchecks reads (standard names from compliance-checker)."""
    cc = pytest.importorskip("compliance_checker")
    names = Path(cc.__file__).parent / "data" / "cf-standard-name-table.xml"
    if not names.is_file():
        pytest.skip("compliance-checker ships no CF standard-name table")
    area, region = tmp_path / "area-types.xml", tmp_path / "regions.xml"
    area.write_text('<?xml version="1.0"?>\n<area_type_table><version_number>0</version_number>'
                    '<date>none</date></area_type_table>\n')
    region.write_text('<?xml version="1.0"?>\n<standardized_region_list><version_number>0</version_number>'
                      '<date>none</date></standardized_region_list>\n')
    return {"cfStandardNamesXML": str(names), "cfAreaTypesXML": str(area), "cfRegionNamesXML": str(region)}


def test_result_files_are_netcdf_with_nc_suffix(results):
    for name, path in results.items():
        assert path.suffix == ".nc" and path.name == f"{name}.nc"
        assert path.read_bytes()[:8] == b"\x89HDF\r\n\x1a\n"  # netCDF-4 = HDF5 container


def assert_cfchecks_clean(paths, tmp_path) -> None:
    """Run cfchecks (CF 1.8) on each file: no FATAL, no ERROR, no WARN (skips without cfchecker/UDUNITS-2).

    Also used by the tests of the other writers (knife-edge, compare, periodic, batch)."""
    try:
        from cfchecker.cfchecks import CFChecker
    except (ImportError, OSError) as exc:  # cfunits loads the UDUNITS-2 C library when imported
        pytest.skip(f"cfchecker or the UDUNITS-2 library is not installed: {exc}")
    tables = _checker_tables(tmp_path)
    for path in paths:
        checker = CFChecker(silent=True, **tables)
        checker.checker(str(path))
        counts = checker.get_total_counts()
        problems = [m for m in checker.all_messages if m.split(":")[0] in ("FATAL", "ERROR", "WARN")]
        assert counts["FATAL"] == 0 and counts["ERROR"] == 0 and counts["WARN"] == 0, (str(path), problems)
        assert any("Checking against CF Version CF-1.8" in m for m in checker.all_messages)


def test_cfchecks_reports_no_error_and_no_warning(results, tmp_path):
    assert_cfchecks_clean(results.values(), tmp_path)


def test_compliance_checker_finds_only_its_earth_grid_heuristic(results, tmp_path):
    pytest.importorskip("compliance_checker")
    from compliance_checker.runner import CheckSuite, ComplianceChecker

    try:  # register only the CF 1.8 suite (loading every plugin takes ~10 s)
        from compliance_checker.cf.cf_1_8 import CF1_8Check

        CheckSuite.checkers.setdefault("cf:1.8", CF1_8Check)
    except ImportError:
        CheckSuite().load_all_available_checkers()
    for name, path in results.items():
        out = tmp_path / f"{name}.json"
        ComplianceChecker.run_checker(str(path), ["cf:1.8"], 0, "normal", output_filename=str(out),
                                      output_format="json")
        report = json.loads(out.read_text())["cf:1.8"]
        failed = [(item["name"], m) for level in ("high_priorities", "medium_priorities", "low_priorities")
                  for item in report[level] if item["value"][0] < item["value"][1] for m in item["msgs"]]
        # compliance-checker takes a coordinate with axis = "Y" for a latitude; a laboratory object plane has
        # no latitude/longitude (CF 1.8 section 4: axis marks the horizontal axes), so only that may remain
        others = [f for f in failed if not any(w in f[1] for w in ("latitude", "longitude"))
                  or not f[0].startswith(("§4.1 ", "§4.2 ", "§5.6 "))]
        assert others == [], (name, others)


def test_cf_xarray_finds_x_and_y_axes(results):
    pytest.importorskip("cf_xarray")
    for path in results.values():
        ds = open_result(path)
        assert ds.cf.axes == {"X": ["x"], "Y": ["y"]}
        assert "positive" not in ds.y.attrs  # CF: a vertical-coordinate attribute
        assert ds.cf["Y"].name == "y" and ds.cf["X"].name == "x"


EXPECTED_DIMENSIONALITY = {
    "y": "[length]", "x": "[length]", "row_px": "", "col_px": "",
    "displacement_y": "", "displacement_x": "", "displacement_magnitude": "",
    "displacement_y_uncertainty": "", "displacement_x_uncertainty": "",
    "deflection_y": "", "deflection_x": "", "masked": "", "invalid": "",
    "refractive_index": "", "refractive_index_uncertainty": "",
    "density": "[mass] / [length] ** 3", "density_uncertainty": "[mass] / [length] ** 3",
    "temperature": "[temperature]", "temperature_uncertainty": "[temperature]",
    "acoustic_pressure": "[mass] / [length] / [time] ** 2",
    "acoustic_pressure_uncertainty": "[mass] / [length] / [time] ** 2",
}


def test_every_unit_parses_to_the_right_dimensionality(results):
    pytest.importorskip("cf_xarray")
    from cf_xarray.units import units as ureg

    try:  # UDUNITS-2 itself, through cfunits, where the C library is installed
        from cfunits import Units
    except (ImportError, OSError):
        Units = None
    udunits_si = {"[length]": "m", "": "1", "[mass] / [length] ** 3": "kg m-3", "[temperature]": "K",
                  "[mass] / [length] / [time] ** 2": "Pa"}
    seen = set()
    for path in results.values():
        ds = open_result(path)
        for name in ds.variables:
            units = ds[name].attrs["units"]
            assert "px" not in units.split(), name  # pint reads px as a CSS pixel (1/96 inch)
            dim = ureg.Quantity(1.0, units).dimensionality
            assert str(dim) == (EXPECTED_DIMENSIONALITY[name] or "dimensionless"), (name, units, dim)
            if Units is not None:
                u, ref = Units(units), Units(udunits_si[EXPECTED_DIMENSIONALITY[name]])
                assert u.isvalid and u.equivalent(ref), (name, units)
            seen.add(name)
    assert seen == set(EXPECTED_DIMENSIONALITY)
    # radians are dimensionless but convert as angles: 1 rad = 1e6 µrad
    assert ureg.Quantity(1.0, "rad").to("microradian").magnitude == pytest.approx(1e6)


def test_pint_xarray_converts_with_the_right_factors(results):
    pytest.importorskip("pint_xarray")
    pytest.importorskip("cf_xarray")
    from cf_xarray.units import units as ureg

    ds = open_result(results["planar"])
    q = ds[["density", "temperature"]].pint.quantify(unit_registry=ureg)
    rho = q.density.pint.to("g/L")  # 1 kg m-3 = 1 g/L
    np.testing.assert_allclose(rho.pint.magnitude, ds.density.values, rtol=1e-12)
    x_mm = ds.x.pint.quantify(unit_registry=ureg).pint.to("mm")
    np.testing.assert_allclose(x_mm.pint.magnitude, ds.x.values * 1e3, rtol=1e-12)
    t_c = q.temperature.pint.to("degC")
    np.testing.assert_allclose(t_c.pint.magnitude, ds.temperature.values - 273.15, rtol=1e-12)


def test_plain_plot_shows_the_picture_upright(results):
    matplotlib = pytest.importorskip("matplotlib")
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    ds = open_result(results["planar"])
    assert ds.row_px.values[0] < ds.row_px.values[-1]  # array row 0 is the top image row
    mesh = ds.temperature.plot()
    ax = mesh.axes
    try:
        lo, hi = ax.get_ylim()
        assert lo < hi and not ax.yaxis_inverted()  # y grows upward on the screen
        corners = mesh.get_coordinates()  # (rows + 1, cols + 1, 2) cell corners in data units
        # the cells of the first array row (top image row) lie above those of the last row
        assert corners[0, :, 1].min() > corners[-1, :, 1].max()
        assert corners[0, 0, 1] == pytest.approx(hi, rel=1e-6)
        assert "up" in ax.get_ylabel()
    finally:
        plt.close(ax.figure)


def test_flags_follow_cf_and_decode_to_bool(results):
    import h5py

    path = results["column"]
    with h5py.File(path, "r") as h5:
        for flag in ("masked", "invalid"):
            assert h5[flag].dtype == np.int8  # CF 1.8 section 2.2: no unsigned types
            np.testing.assert_array_equal(h5[flag].attrs["flag_values"], [0, 1])
            assert h5[flag].attrs["flag_values"].dtype == np.int8
            assert len(h5[flag].attrs["flag_meanings"].split()) == 2
    ds = open_result(path)
    r = read_result(path)
    for flag in ("masked", "invalid"):
        assert ds[flag].dtype == bool and r[flag].data.dtype == bool
        np.testing.assert_array_equal(ds[flag].values, r[flag].data)
    # rejected vectors are NaN in the fields
    assert np.isnan(ds.temperature.values[ds.invalid.values]).all()


def test_file_carries_history_source_references_and_the_experiment_text(results):
    for name, path in results.items():
        ds = open_result(path)
        a = ds.attrs
        assert a["Conventions"] == "CF-1.8" and a["title"] == f"BOS result {name}"
        assert a["history"].count("\n") == 0 and "bos run from" in a["history"] and a["history"][:4].isdigit()
        assert "background-oriented schlieren" in a["source"]
        assert "Richard, H. and Raffel, M. (2001)" in a["references"]
        assert "Scarano, F. (2002)" in a["references"]
        assert a["experiment_file_text"] == (path.parent.parent / f"{name}.toml").read_text()
        assert isinstance(a["rig"], dict) and a["rig"]["focal_length_m"] == pytest.approx(0.05)
        assert isinstance(a["summary"], dict) and isinstance(a["flow_source"], dict)
        assert not [k for k in a if "." in k]
        line = np.asarray(a["profile_line_m"]).reshape(2, 2)
        assert np.isfinite(line).all()
    refs = {n: open_result(p).attrs["references"] for n, p in results.items()}
    assert "Dasch, C. J. (1992)" in refs["column"] and "Dasch" not in refs["planar"]
    assert "Simchony" in refs["planar"] and "Ciddor" in refs["planar"] and "Ciddor" not in refs["shift"]
