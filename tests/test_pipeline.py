"""bos.pipeline: stage helpers, result layout, files written by save_run.

Outside sources of the checks:
* window schedule: halving per pass (64 -> 32 -> 16) is common practice in
  multi-pass correlation (Scarano 2002);
* profiles: bilinear interpolation reproduces a linear field exactly
  (analytic);
* the result file is read with xarray + h5netcdf (general-purpose netCDF4
  readers) and the input hashes with hashlib (standard library).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest

import bos
from bos import config, pipeline
from bos.displacement import DisplacementField
from bos.errors import ConfigError, DataFileError
from bos.reconstruct import object_coordinates

xr = pytest.importorskip("xarray")


# ----------------------------------------------------------------------------- helpers


def test_window_schedule_halves_per_pass():
    # 64 -> 32 -> 16 is the usual multi-pass schedule (common practice, Scarano 2002)
    assert pipeline.window_schedule(64, 16, 3) == (64, 32, 16)
    assert pipeline.window_schedule(64, 16, 1) == (16,)
    assert pipeline.window_schedule(48, 16, 2) == (48, 16)
    assert pipeline.window_schedule(128, 16, 4) == (128, 64, 32, 16)
    with pytest.raises(ConfigError, match="final_window_px"):
        pipeline.window_schedule(16, 32, 2)


def test_reference_mask_on_the_vector_grid():
    rows, cols = np.arange(8.0, 64.0, 8.0), np.arange(8.0, 96.0, 8.0)
    left = pipeline.reference_mask("left", rows, cols)
    assert left[:, 0].all() and left.sum() == rows.size
    edges = pipeline.reference_mask("edges", rows, cols)
    assert edges.sum() == 2 * rows.size + 2 * cols.size - 4
    box = pipeline.reference_mask((0, 20, 80, 96), rows, cols)      # rows 8, 16; cols 80, 88
    assert box.sum() == 4 and box[0, -2] and box[1, -1]
    with pytest.raises(ConfigError, match="no vector-grid point"):
        pipeline.reference_mask((1, 3, 1, 3), rows, cols)


def test_camera_motion_region_choices(tmp_path):
    exp = config.experiment_from_dict({"processing": {"camera_motion": "none"}})
    assert pipeline.camera_motion_region(exp, (64, 80)) is None
    exp = config.experiment_from_dict({"processing": {"camera_motion": "border"}})
    assert pipeline.camera_motion_region(exp, (64, 80)) == "border"
    exp = config.experiment_from_dict({"processing": {"camera_motion": "mask"},
                                       "reconstruction": {"reference_region": [0, 10, 70, 80]}})
    region = pipeline.camera_motion_region(exp, (64, 80))
    assert region.sum() == 10 * 10 and region[5, 75] and not region[20, 75]


# ----------------------------------------------------------------------------- a crafted result


@dataclass
class _Density:
    density: np.ndarray
    temperature: np.ndarray
    index: np.ndarray
    sigma_density: np.ndarray
    sigma_temperature: np.ndarray
    sigma_index: np.ndarray


EXP = """
[camera]
focal_length_mm = 50
pixel_pitch_um = 5
[geometry]
camera_to_object_m = 0.6
object_to_background_m = 0.4
object_width_mm = 50
[medium]
temperature_k = 293.15
[source]
kind = "plume"
[images]
reference = "ref.bin"
measurement = "meas.bin"
[output]
directory = "out"
name = "crafted"
profile = [[-1.0, 0.5], [1.5, 0.5]]
"""


def _crafted(tmp_path: Path):
    """A RunResult with linear fields, one masked block and one rejected vector."""
    f = tmp_path / "exp.toml"
    f.write_text(EXP)
    (tmp_path / "ref.bin").write_bytes(b"reference bytes")
    (tmp_path / "meas.bin").write_bytes(b"measurement bytes")
    exp = config.load_experiment(f)
    rig, med = exp.rig(), exp.medium_model()
    rows = np.arange(8.0, 200.0, 8.0)
    cols = np.arange(8.0, 300.0, 8.0)
    y, x = object_coordinates(rows, cols, rig=rig, shape=(208, 308))
    yy, xx = np.meshgrid(y, x, indexing="ij")
    temperature = 300.0 + 2000.0 * xx + 500.0 * yy          # linear: bilinear profiles are exact
    masked = np.zeros(yy.shape, bool)
    masked[:3, :4] = True
    invalid = np.zeros(yy.shape, bool)
    invalid[10, 10] = True
    nodata = masked | invalid
    dy = np.where(nodata, np.nan, 0.1 * np.ones(yy.shape))
    dx = np.where(nodata, np.nan, -0.2 + 0.0 * xx)
    sig = np.where(nodata, np.nan, 0.01)
    disp = DisplacementField(dy=dy, dx=dx, rows=rows, cols=cols, masked=masked, invalid=invalid,
                             sigma_dy=sig, sigma_dx=sig, camera_shift=(0.25, -0.5), method="correlation")
    t = np.where(nodata, np.nan, temperature)
    rho = med.density_from_temperature(t)
    dens = _Density(density=rho, temperature=t, index=med.index_from_density(rho),
                    sigma_density=np.full(t.shape, 1e-4), sigma_temperature=np.full(t.shape, 0.5),
                    sigma_index=np.full(t.shape, 1e-8))
    s = rig.sensitivity_px_per_rad
    inputs = pipeline.Inputs(reference=np.zeros((208, 308)), measurement=np.zeros((208, 308)), mask=None,
                             paths={"reference": tmp_path / "ref.bin", "measurement": tmp_path / "meas.bin"},
                             sha256={"reference": hashlib.sha256(b"reference bytes").hexdigest(),
                                     "measurement": hashlib.sha256(b"measurement bytes").hexdigest()},
                             warnings=["reference image is lossy"])
    summary = pipeline.summarize(disp, dens, medium=med, warnings=inputs.warnings)
    result = pipeline.RunResult(displacement=disp, eps_y=-dy / s, eps_x=-dx / s, density=dens, y_m=y, x_m=x,
                                summary=summary, warnings=inputs.warnings,
                                attrs={"software_version": bos.__version__, "input_sha256": inputs.sha256,
                                       "rig": pipeline._rig_dict(rig), "summary": pipeline.jsonable(summary)},
                                inputs=inputs)
    return exp, result, temperature


def test_summary_counts_masked_and_invalid_separately(tmp_path):
    _, result, temperature = _crafted(tmp_path)
    s = result.summary
    n = temperature.size
    assert s["vectors"] == n
    assert s["masked_fraction"] == pytest.approx(12 / n)
    assert s["invalid_fraction"] == pytest.approx(1 / n)
    assert s["valid_fraction"] == pytest.approx((n - 13) / (n - 12))   # of the unmasked vectors
    assert s["peak_displacement_px"] == pytest.approx(np.hypot(0.1, 0.2))
    assert s["median_uncertainty_px"] == pytest.approx(np.hypot(0.01, 0.01))
    assert s["camera_shift_px"] == [0.25, -0.5]
    valid_t = temperature[~(result.displacement.masked | result.displacement.invalid)]
    assert s["max_temperature_k"] == pytest.approx(valid_t.max())
    assert s["peak_temperature_rise_k"] == pytest.approx(valid_t.max() - 293.15)
    assert s["warnings"] == ["reference image is lossy"]


def test_save_run_writes_self_describing_files(tmp_path):
    exp, result, temperature = _crafted(tmp_path)
    files = pipeline.save_run(result, exp)
    out = tmp_path / "out"
    assert files[0] == out / "crafted.nc"
    assert {p.name for p in files} == {"crafted.nc", "crafted-profile.csv", "crafted-displacement.png",
                                       "crafted-deflection.png", "crafted-density.png", "crafted-profile.png"}
    assert not list(out.glob("*.part*")) and not list(out.glob(".*"))
    with xr.open_dataset(files[0], engine="h5netcdf") as ds:
        for name in list(ds.data_vars) + list(ds.coords):
            assert ds[name].attrs.get("units"), name
            assert ds[name].attrs.get("long_name"), name
        # the file's y points up (axis Y, no CF "positive"), so a plain plot is upright
        assert ds.y.attrs["axis"] == "Y" and "positive" not in ds.y.attrs and "UP" in ds.attrs["coordinate_note"]
        np.testing.assert_allclose(ds.y.values, -result.y_m)
        assert ds.temperature.attrs["units"] == "K" and ds.temperature.attrs["standard_name"] == "air_temperature"
        assert ds.density.attrs["units"] == "kg m-3" and ds.deflection_x.attrs["units"] == "rad"
        # masked and invalid are separate flags; the fields are NaN at both
        m, inv = ds.masked.values.astype(bool), ds.invalid.values.astype(bool)
        assert m.sum() == 12 and inv.sum() == 1 and not (m & inv).any()
        assert np.isnan(ds.temperature.values[m | inv]).all()
        np.testing.assert_allclose(ds.temperature.values[~(m | inv)], temperature[~(m | inv)])
        assert ds.attrs["software_version"] == bos.__version__
        assert '"reference": "' + hashlib.sha256(b"reference bytes").hexdigest() in ds.attrs["input_sha256"]
        np.testing.assert_allclose(ds.x.values, result.x_m)


def test_profile_csv_is_exact_for_a_linear_field(tmp_path):
    # bilinear interpolation of a linear field is exact (analytic)
    exp, result, _ = _crafted(tmp_path)
    pipeline.save_run(result, exp)
    # header "name [units]": numpy names the columns x_m, y_m, temperature_K
    table = np.genfromtxt(tmp_path / "out" / "crafted-profile.csv", delimiter=",", names=True)
    expected = 300.0 + 2000.0 * table["x_m"] - 500.0 * table["y_m"]  # the CSV's y is the file's (up)
    ok = np.isfinite(table["temperature_K"])
    assert ok.sum() >= 0.8 * ok.size
    np.testing.assert_allclose(table["temperature_K"][ok], expected[ok], rtol=1e-10)
    # the line from the experiment file (y down), converted mm -> m, in file coordinates (y up)
    assert table["x_m"][0] == pytest.approx(-1.0e-3) and table["x_m"][-1] == pytest.approx(1.5e-3)
    np.testing.assert_allclose(table["y_m"], -0.5e-3)


def test_save_run_refuses_a_file_as_output_directory(tmp_path):
    exp, result, _ = _crafted(tmp_path)
    (tmp_path / "out").write_text("not a directory")
    with pytest.raises(DataFileError, match="output directory"):
        pipeline.save_run(result, exp)


def test_experiment_file_doc_lists_every_key():
    # docs/experiment-file.md is generated from bos.config.SCHEMA; keep it in sync
    doc = (Path(__file__).resolve().parents[1] / "docs" / "experiment-file.md").read_text(encoding="utf-8")
    assert config.schema_markdown() in doc
    for section, specs in config.SCHEMA.items():
        assert f"### [{section}]" in doc
        for key in specs:
            assert f"| `{key}` |" in doc, f"{section}.{key} undocumented"


def test_exif_focal_length_fills_only_a_missing_value():
    exif = {"focal_length_m": 0.085, "f_number": 4.0}
    given = config.experiment_from_dict({"camera": {"focal_length_mm": 50}})
    same, notes = pipeline.with_exif_defaults(given, exif)
    assert same.camera.focal_length_m == pytest.approx(0.050) and notes == []   # explicit settings win
    missing = config.experiment_from_dict({})
    filled, notes = pipeline.with_exif_defaults(missing, exif)
    assert filled.camera.focal_length_m == pytest.approx(0.085)
    assert "EXIF" in notes[0] and "85 mm" in notes[0]
    assert pipeline.with_exif_defaults(missing, {})[0] is missing


def test_save_run_leaves_nothing_when_a_later_file_fails(tmp_path, monkeypatch):
    exp, result, _ = _crafted(tmp_path)

    def broken(*args, **kwargs):
        raise OSError("disk full (simulated)")

    from bos import output

    monkeypatch.setattr(output, "write_profile_csv", broken)
    with pytest.raises(OSError, match="disk full"):
        pipeline.save_run(result, exp)
    assert list((tmp_path / "out").iterdir()) == []


def test_field_figures_use_mm_axes_y_down_and_unit_colour_bars():
    from bos import plots

    # pixel-centre extent: first/last coordinate -/+ half a spacing, converted m -> mm (arithmetic)
    x = np.linspace(-0.010, 0.010, 21)
    y = np.linspace(-0.005, 0.005, 11)
    data = np.outer(np.ones(11), x)
    fig = plots.build_fields_figure([plots.Panel(data, "temperature", "K")], x_m=x, y_m=y,
                                    profile_m=[[-0.02, 0.0], [0.02, 0.0]])
    ax = fig.axes[0]
    assert ax.get_xlabel() == "x [mm]" and "down" in ax.get_ylabel()
    np.testing.assert_allclose(ax.get_xlim(), [-10.5, 10.5])
    np.testing.assert_allclose(ax.get_ylim(), [5.5, -5.5])      # inverted: y grows downward
    assert any(a.get_ylabel() == "temperature [K]" for a in fig.axes[1:])   # colour bar
