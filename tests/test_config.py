"""Experiment-file schema: parsing, unit conversion, validation errors."""

import dataclasses

import pytest

from bos import config
from bos.errors import ConfigError, DataFileError

EXAMPLE = """
[camera]
focal_length_mm = 50
pixel_pitch_um = 5.0
f_number = 11
sensor_px = [3000, 4000]
wavelength_nm = 632.8

[geometry]
camera_to_object_m = 1.0
object_to_background_m = 0.5
object_width_mm = 20

[medium]
gas = "air"
temperature_c = 20
relative_humidity = 40

[images]
reference = "ref.png"
measurement = "meas.png"

[output]
profile = [[-10, 0], [10, 0]]
"""


def test_units_are_converted_to_si(tmp_path):
    f = tmp_path / "exp.toml"
    f.write_text(EXAMPLE)
    exp = config.load_experiment(f)
    assert exp.camera.focal_length_m == pytest.approx(0.050)
    assert exp.camera.pixel_pitch_m == pytest.approx(5e-6)
    assert exp.camera.wavelength_m == pytest.approx(632.8e-9)
    assert exp.camera.sensor_px == (3000, 4000)
    assert exp.geometry.z_a_m == 1.0 and exp.geometry.z_d_m == 0.5 and exp.geometry.z_b_m is None
    assert exp.geometry.object_width_m == pytest.approx(0.020)
    # 20 degC = 293.15 K (ITS-90 definition of the Celsius scale)
    assert exp.medium.temperature_k == pytest.approx(293.15)
    assert exp.output.profile == [[-0.010, 0.0], [0.010, 0.0]]
    assert exp.resolve(exp.images.reference) == tmp_path / "ref.png"


def test_overrides_win_over_the_file(tmp_path):
    f = tmp_path / "exp.toml"
    f.write_text(EXAMPLE)
    exp = config.load_experiment(f, overrides={"camera.focal_length_mm": 85, "camera.f_number": None})
    assert exp.camera.focal_length_m == pytest.approx(0.085)
    assert exp.camera.f_number == 11


def test_dataclass_defaults_match_schema_defaults():
    # The schema drives the docs; the dataclasses drive the code: they must agree.
    for name, specs in config.SCHEMA.items():
        cls = config._SECTION_CLASSES[name]
        defaults = {f.name: f.default for f in dataclasses.fields(cls)}
        for key, spec in specs.items():
            target = spec.target or key
            if spec.default is None or target not in defaults:
                continue
            expected = spec.default * spec.scale if spec.kind == "float" else spec.default
            got = defaults[target]
            if spec.kind == "path":
                got = str(got)
            assert got == pytest.approx(expected) if spec.kind == "float" else got == expected, (name, key)


@pytest.mark.parametrize(
    "text, fragment",
    [
        ("[camera]\nfocal_lenght_mm = 50\n", "unknown key in [camera]: focal_lenght_mm"),
        ("[cam]\nx = 1\n", "unknown section: cam"),
        ("[camera]\nf_number = 0.2\n", "--f-number (camera.f_number) must be between 0.5 and 128"),
        ("[camera]\nfocal_length_mm = -5\n", "--focal-length-mm (camera.focal_length_mm) must be between 1 and 5000"),
        ("[camera]\nwavelength_nm = 2000\n", "--wavelength-nm (camera.wavelength_nm) must be between 300 and 1700"),
        ("[camera]\nfocal_length_mm = \"fifty\"\n", "must be a number"),
        ("[camera]\nsensor_px = [10]\n", "(camera.sensor_px) must be [rows, cols]"),
        ("[medium]\ntemperature_c = 20\ntemperature_k = 293\n", "not both"),
        ("[medium]\ncomposition = {he = 0.5, air = 0.4}\n", "sum to 1"),
        ("[processing]\npasses = 2.5\n", "whole number"),
        ("[source]\nkind = \"volcano\"\n", "--source (source.kind) must be one of"),
        ("[reconstruction]\nreference_region = [10, 5, 0, 4]\n", "empty"),
        ("[output]\nprofile = [[0, 0]]\n", "output.profile"),
        ("[images]\nmask_polygons = [[[0, 0], [1, 1]]]\n", "at least 3 points"),
        ("[camera\nfocal_length_mm = 50\n", "not valid TOML"),
    ],
)
def test_bad_files_give_one_line_config_errors(tmp_path, text, fragment):
    f = tmp_path / "bad.toml"
    f.write_text(text)
    with pytest.raises(ConfigError) as info:
        config.load_experiment(f)
    msg = str(info.value)
    assert fragment in msg
    assert "\n" not in msg


def test_missing_file_is_a_data_file_error(tmp_path):
    with pytest.raises(DataFileError, match="not found"):
        config.load_experiment(tmp_path / "nope.toml")


def test_rig_needs_two_distances():
    exp = config.experiment_from_dict({"camera": {"focal_length_mm": 50, "pixel_pitch_um": 5},
                                       "geometry": {"camera_to_object_m": 1.0}})
    with pytest.raises(ConfigError, match="exactly two"):
        exp.rig()
