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


# --------------------------------------------------------------------------- all problems at once


def test_all_problems_reported_at_once_in_one_line(tmp_path):
    f = tmp_path / "bad.toml"
    f.write_text("[camera]\nfocal_lenght_mm = 50\nf_number = 0.2\nobject_width_mm = 20\n"
                 "[camra]\nx = 1\n[geometry]\nobject_to_background_m = 1e308\n"
                 "[reconstruction]\nkind = \"axisymetric\"\n[medium]\ntemperature_c = 20\ntemperature_k = 293\n")
    with pytest.raises(ConfigError) as info:
        config.load_experiment(f)
    msg, problems = str(info.value), info.value.problems
    assert "\n" not in msg and msg.startswith(f"{len(problems)} problems")
    expected = [
        "unknown key in [camera]: focal_lenght_mm (did you mean focal_length_mm?)",
        "--f-number (camera.f_number) must be between 0.5 and 128, got 0.2",
        "unknown key in [camera]: object_width_mm (it belongs in [geometry])",
        "unknown section: camra (did you mean 'camera'?)",
        "--object-to-background-m (geometry.object_to_background_m) must be between 0.001 and 1000, got 1e+308",
        "--kind (reconstruction.kind) must be one of planar, axisymmetric, none; got 'axisymetric' "
        "(did you mean 'axisymmetric'?)",
        "[medium] give temperature_c or temperature_k",
    ]
    assert len(problems) == len(expected)
    for fragment in expected:
        assert any(fragment in p for p in problems), fragment
        assert fragment in msg


@pytest.mark.parametrize("section, key, value", [
    ("geometry", "camera_to_background_m", 1e308),     # distances of 1e308 m
    ("geometry", "object_to_background_m", 2500.0),    # a Z_D of kilometres
    ("geometry", "camera_to_object_m", 0.001),         # 1 mm from the lens
    ("camera", "focal_length_mm", 50000.0),            # a focal length of metres (50 m)
    ("camera", "focal_length_mm", 0.05),               # metres typed into the mm key
    ("camera", "pixel_pitch_um", 5000.0),              # a pixel pitch of mm
    ("camera", "pixel_pitch_um", 0.005),               # mm typed into the um key
    ("geometry", "object_width_mm", 1e7),              # a 10 km wide object
    ("source", "frequency_hz", 1e12),
    ("plan", "expected_deflection_rad", 2.0),
])
def test_absurd_but_positive_values_are_refused_naming_key_and_option(section, key, value):
    with pytest.raises(ConfigError) as info:
        config.experiment_from_dict({section: {key: value}})
    msg = str(info.value)
    assert f"{config.option_name(f'{section}.{key}')} ({section}.{key}) must be" in msg


@pytest.mark.parametrize("section, key, value", [
    ("geometry", "camera_to_background_m", 120.0),     # outdoor background 120 m away
    ("camera", "focal_length_mm", 2.2),                # phone camera
    ("camera", "focal_length_mm", 1200.0),             # long telephoto
    ("camera", "pixel_pitch_um", 0.8),                 # phone sensor
    ("camera", "pixel_pitch_um", 24.0),                # scientific CCD
    ("geometry", "object_to_background_m", 0.005),     # micro BOS
])
def test_real_rigs_stay_inside_the_ranges(section, key, value):
    config.experiment_from_dict({section: {key: value}})


def test_rig_names_missing_options():
    with pytest.raises(ConfigError) as info:
        config.experiment_from_dict({"geometry": {"camera_to_object_m": 1.0}}).rig()
    msg = str(info.value)
    assert "missing --focal-length-mm (camera.focal_length_mm)" in msg
    assert "missing --pixel-pitch-um (camera.pixel_pitch_um)" in msg and "exactly two" in msg


def test_missing_for_run_lists_what_a_planar_run_needs():
    exp = config.experiment_from_dict({"images": {"reference": "r.png"}})
    assert config.missing_for_run(exp, focal_length_from_exif=False) == [
        "missing --measurement (images.measurement)", "missing --focal-length-mm (camera.focal_length_mm)",
        "missing --pixel-pitch-um (camera.pixel_pitch_um)", "missing --object-width-mm (geometry.object_width_mm)",
        "geometry needs exactly two of --camera-to-background-m (geometry.camera_to_background_m), "
        "--object-to-background-m (geometry.object_to_background_m), --camera-to-object-m "
        "(geometry.camera_to_object_m) (got 0)"]
    axi = config.experiment_from_dict({"reconstruction": {"kind": "axisymmetric"}})
    assert not any("object_width" in p for p in config.missing_for_run(axi))


def test_choices_match_the_library_registries():
    from bos import displacement
    from bos.reconstruct import poisson
    from bos.reconstruct.abel import operator

    assert set(config.SCHEMA["processing"]["method"].choices) == set(displacement.METHODS)
    assert set(config.SCHEMA["reconstruction"]["abel_method"].choices) == set(operator.METHODS)
    assert set(config.SCHEMA["reconstruction"]["solver"].choices) == {"auto", *poisson.SOLVERS}


def test_dumps_toml_round_trips_and_refuses_invalid_settings():
    data = {"camera": {"focal_length_mm": 85.0, "pixel_pitch_um": 3.45},
            "images": {"mask_polygons": [[[0, 0], [4, 0], [4, 4]]], "reference": 'we"ird.png'},
            "medium": {"composition": {"he": 0.25, "air": 0.75}}, "output": {"figures": False}}
    import tomllib

    assert tomllib.loads(config.dumps_toml(data, header="two\nlines")) == data
    with pytest.raises(ConfigError):
        config.dumps_toml({"camera": {"focal_length_mm": 1e6}})
