"""CLI conventions: --version, -h, completion, choices/defaults/flags in --help, examples,
a complete option set for `bos run`, errors naming option and key, strict JSON, `bos init`.

Outside sources of the checks: the installed package metadata (importlib.metadata) and
pyproject.toml (tomllib) for the version; the standard-library JSON parser in strict mode
(RFC 8259 has no NaN/Infinity); the `jsonschema` library for the published JSON Schema.
"""

from __future__ import annotations

import importlib.metadata
import json
import math
import tomllib
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from bos import config
from cli.app import get_app

ROOT = Path(__file__).resolve().parents[1]
runner = CliRunner()


def invoke(*args):
    return runner.invoke(get_app(), [str(a) for a in args])


def command_names() -> list[str]:
    return sorted(c.name for c in get_app().registered_commands)


def command_callback(name: str):
    return next(c.callback for c in get_app().registered_commands if c.name == name)


def one_line_error(res, code=2) -> str:
    assert res.exit_code == code, (res.stdout, res.stderr)
    err = res.stderr.strip()
    assert err.startswith("error:") and "\n" not in err, err
    assert "Traceback" not in res.output
    return err


def strict_loads(text: str):
    def no_constants(name):
        raise ValueError(f"non-standard JSON constant {name}")

    return json.loads(text, parse_constant=no_constants)


# --------------------------------------------------------------------------- version, help, completion


def test_version_comes_from_the_package_metadata():
    import bos

    meta = importlib.metadata.version("bos-toolkit")
    declared = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["version"]
    assert bos.__version__ == meta == declared
    for flag in ("--version", "-V"):
        res = invoke(flag)
        assert res.exit_code == 0 and res.stdout.strip() == f"bos {meta}"


def test_short_and_long_help_on_every_command_with_completion():
    root = invoke("-h")
    assert root.exit_code == 0 and root.stdout == invoke("--help").stdout
    assert "--install-completion" in root.stdout and "--show-completion" in root.stdout
    names = command_names()
    assert {"run", "synth", "init", "plan"} <= set(names)
    for name in names:
        short, long = invoke(name, "-h"), invoke(name, "--help")
        assert short.exit_code == 0 and short.stdout == long.stdout, name
        assert short.stdout.startswith("Usage:"), name
        # boolean options read as flags, never as a value to type
        assert "<bool>" not in short.stdout, name


@pytest.mark.parametrize("name", ["run", "synth", "init"])
def test_examples_in_help(name):
    text = invoke(name, "-h").stdout
    assert "Examples:" in text
    assert text.count(f"bos {name}") >= 2


def test_choices_and_defaults_shown():
    run = " ".join(invoke("run", "-h").stdout.split())
    motions = "|".join(config.SCHEMA["processing"]["camera_motion"].choices)
    for fragment in ("planar|axisymmetric|none", motions, "vertical|horizontal", "correlation|flow",
                     "neumann|dirichlet|mixed", "[default: 64]", "[default: planar]",
                     "--figures / --no-figures", "--weighted / --unweighted", "between 1 and 5000"):
        assert fragment in run, fragment
    for kind in config.SCHEMA["source"]["kind"].choices:
        assert kind in run
    synth = " ".join(invoke("synth", "-h").stdout.split())
    assert "uniform|gaussian-blob|hot-column|planar-layer" in synth
    assert "png|tiff" in synth and "[default: 0.5]" in synth


def test_bad_choice_and_bad_type_are_one_line_usage_errors():
    err = one_line_error(invoke("run", "--kind", "planer"))
    assert "--kind" in err and "planar" in err
    err = one_line_error(invoke("run", "--window-px", "abc"))
    assert "--window-px" in err
    one_line_error(invoke("no-such-command"))


def test_same_aliases_in_every_command_that_takes_the_rig():
    from cli._common import ALIASES

    pairs = [(config.option_name(key), alias) for key, aliases in ALIASES.items() for alias in aliases]
    seen = set()
    for name in command_names():
        text = invoke(name, "-h").stdout
        for canonical, alias in pairs:
            if canonical in text:
                assert f"{canonical}, {alias}" in text, (name, canonical, alias)
                seen.add(name)
    assert {"run", "synth", "plan"} <= seen
    # the alias really sets the same value
    a = invoke("plan", "--focal-length-mm", 50, "--pixel-pitch-um", 5, "--camera-to-object-m", 1,
               "--object-to-background-m", 0.5, "--object-width-mm", 100, "--json")
    b = invoke("plan", "--focal-mm", 50, "--pixel-um", 5, "--za-m", 1, "--zd-m", 0.5, "--width-mm", 100, "--json")
    assert a.exit_code == 0 and a.stdout == b.stdout


# --------------------------------------------------------------------------- bos run without a file


RUN_EXCLUDED = {"plan", "camera.model", "camera.sensor_px", "source.description"}  # not used by a run


def test_every_run_setting_has_an_option_mapped_to_its_key():
    from cli._common import key_overrides

    import inspect

    run = command_callback("run")
    mapped = {getattr(p.default, "bos_key", None) for p in inspect.signature(run).parameters.values()} - {None}
    needed = {f"{s}.{k}" for s, specs in config.SCHEMA.items() for k in specs
              if s not in RUN_EXCLUDED and f"{s}.{k}" not in RUN_EXCLUDED}
    assert mapped == needed
    help_text = invoke("run", "-h").stdout
    for key in needed:
        assert config.option_name(key) in help_text or key in ("output.figures", "reconstruction.weighted"), key
    # values left at None never override the file; the others become file values
    assert key_overrides(run, {}) == {}
    got = key_overrides(run, {"mask_polygon": ["0,0 6,0 6,6"], "profile": "-2,0,2,0", "figures": False,
                              "reference_region": "0,8,0,128", "humidity_pct": 40.0, "source": "plume",
                              "reference": Path("r.png")})
    assert got == {"images.mask_polygons": [[[0, 0], [6, 0], [6, 6]]], "output.profile": [[-2, 0], [2, 0]],
                   "output.figures": False, "reconstruction.reference_region": [0, 8, 0, 128],
                   "medium.relative_humidity": 40.0, "source.kind": "plume",
                   "images.reference": str(Path("r.png").resolve())}
    exp = config.load_experiment(None, overrides=got)
    assert exp.medium.relative_humidity == 40.0 and exp.output.profile == [[-0.002, 0.0], [0.002, 0.0]]


def test_options_parse_to_file_values():
    from cli import _common as c

    assert c.parse_profile("-10, 2.5,10,2.5") == [[-10.0, 2.5], [10.0, 2.5]]
    assert c.parse_polygons(["0,0 40,0 40,300", "1,1;2,1;2,2;1,2"]) == [
        [[0, 0], [40, 0], [40, 300]], [[1, 1], [2, 1], [2, 2], [1, 2]]]
    assert c.parse_region("right") == "right" and c.parse_region("0,64,0,32") == [0, 64, 0, 32]
    assert c.parse_composition("he=0.5,air=0.5") == {"he": 0.5, "air": 0.5}
    from bos.errors import ConfigError

    for func, bad, option in ((c.parse_profile, "1,2,3", "--profile"), (c.parse_polygons, ["0,0 1,1"], "--mask-polygon"),
                              (c.parse_region, "0,10,5", "--reference-region"),
                              (c.parse_composition, "he:0.5", "--composition")):
        with pytest.raises(ConfigError, match=option):
            func(bad)


def test_run_from_options_alone_equals_the_written_experiment_file(tmp_path):
    # a synthetic hot column and the experiment file `bos synth` writes for it
    res = invoke("synth", "--field", "hot-column", "--rows", 96, "--cols", 128, "--radius-mm", 2.5,
                 "--delta-t-k", 30, "--out", tmp_path, "--name", "c")
    assert res.exit_code == 0, res.output
    by_file = invoke("run", tmp_path / "c_experiment.toml", "--no-figures", "--json", "--out", tmp_path / "a")
    assert by_file.exit_code == 0, by_file.output
    by_opts = invoke(
        "run", "--reference", tmp_path / "c_reference.png", "--measurement", tmp_path / "c_measurement.png",
        "--focal-mm", 50, "--pixel-um", 5, "--f-number", 8, "--wavelength-nm", 550, "--za-m", 1,
        "--zd-m", 0.5, "--gas", "air", "--temperature-k", 293.15, "--pressure-pa", 101325,
        "--camera-motion", "none", "--kind", "axisymmetric", "--axis", "vertical", "--axis-px", 63.5,
        "--source", "none", "--no-figures", "--json", "--out", tmp_path / "b", "--name", "c")
    assert by_opts.exit_code == 0, by_opts.output
    a, b = strict_loads(by_file.stdout)["summary"], strict_loads(by_opts.stdout)["summary"]
    for key in ("peak_displacement_px", "peak_temperature_rise_k", "max_temperature_k", "min_density_kg_m3"):
        assert b[key] == pytest.approx(a[key], rel=1e-12), key
    with np.load(tmp_path / "c_truth.npz") as t:
        true_rise = float(t["temperature_k"].max() - t["ambient_temperature_k"])
    assert a["peak_temperature_rise_k"] == pytest.approx(true_rise, rel=0.1)


def test_all_missing_settings_reported_at_once_by_option_and_key(tmp_path):
    err = one_line_error(invoke("run", "--reference", tmp_path / "r.png", "--kind", "planar"))
    for fragment in ("missing --measurement (images.measurement)", "missing --pixel-pitch-um (camera.pixel_pitch_um)",
                     "missing --object-width-mm (geometry.object_width_mm)", "geometry needs exactly two of"):
        assert fragment in err
    assert "4 problems" in err


@pytest.mark.parametrize("args, fragment", [
    (["--object-to-background-m", "1e308"], "--object-to-background-m (geometry.object_to_background_m) must be "
                                            "between 0.001 and 1000"),
    (["--camera-to-object-m", "5000"], "--camera-to-object-m (geometry.camera_to_object_m)"),
    (["--focal-length-mm", "0.05"], "--focal-length-mm (camera.focal_length_mm) must be between 1 and 5000"),
    (["--pixel-pitch-um", "5000"], "--pixel-pitch-um (camera.pixel_pitch_um) must be between 0.5 and 50"),
    (["--object-width-mm", "1e9"], "--object-width-mm (geometry.object_width_mm)"),
    (["--reference-region", "lft"], "did you mean 'left'?"),
    (["--profile", "1,2"], "--profile: expected four numbers"),
])
def test_absurd_values_fail_naming_option_and_key(tmp_path, args, fragment):
    err = one_line_error(invoke("run", "--reference", tmp_path / "r.png", "--measurement", tmp_path / "m.png", *args))
    assert fragment in err


# --------------------------------------------------------------------------- JSON and errors


def test_emit_json_is_strict(capsys):
    from cli._common import emit_json

    emit_json({"a": float("nan"), "b": np.array([1.0, np.inf, -np.inf]), "c": np.float32("nan"),
               "d": [np.int64(3), (math.nan, 2.5)], "e": Path("x/y"), "f": np.bool_(True)})
    out = strict_loads(capsys.readouterr().out)
    assert out == {"a": None, "b": [1.0, None, None], "c": None, "d": [3, [None, 2.5]], "e": "x/y", "f": True}


def test_malformed_json_read_from_a_file_is_a_user_error():
    import typer

    from cli._common import handle_errors

    @handle_errors
    def body():
        return json.loads('{"rig": {"focal_length_m": 0.05')

    with pytest.raises(typer.Exit) as info:
        body()
    assert info.value.exit_code == 2


# --------------------------------------------------------------------------- bos init


def test_init_writes_a_template_that_loads_and_refuses_to_overwrite(tmp_path):
    target = tmp_path / "exp.toml"
    res = invoke("init", target)
    assert res.exit_code == 0, res.output
    text = target.read_text()
    exp = config.load_experiment(target)
    assert exp.camera.focal_length_m == pytest.approx(0.05) and exp.geometry.object_width_m == pytest.approx(0.1)
    for section, specs in config.SCHEMA.items():  # every key is in the template, with its option
        assert f"[{section}]" in text
        for key in specs:
            assert f"{key} =" in text, key
    assert "# option --focal-length-mm" not in text and "option --focal-length-mm" in text
    target.write_text("# mine\n")
    err = one_line_error(invoke("init", target))
    assert "--force" in err and target.read_text() == "# mine\n"
    assert invoke("init", target, "--force").exit_code == 0 and target.read_text() == text
    assert invoke("init", "-").stdout == text
    missing_dir = tmp_path / "nope" / "e.toml"
    one_line_error(invoke("init", missing_dir))


def test_init_schema_is_the_shipped_package_data(tmp_path):
    from importlib.resources import files

    shipped = files("bos").joinpath("data/experiment.schema.json").read_text(encoding="utf-8")
    assert shipped == config.schema_json_text(), "regenerate bos/data/experiment.schema.json"
    assert invoke("init", "--schema").stdout == shipped
    out = tmp_path / "s.json"
    assert invoke("init", "--schema", out).exit_code == 0 and out.read_text() == shipped


def test_template_and_demo_files_validate_against_the_json_schema(tmp_path):
    jsonschema = pytest.importorskip("jsonschema")
    schema = json.loads(config.schema_json_text())
    jsonschema.Draft202012Validator.check_schema(schema)
    validator = jsonschema.Draft202012Validator(schema)
    docs = [tomllib.loads(config.template_toml())]
    demo = sorted(ROOT.glob("bos/data/demo/*/experiment.toml")) or sorted(ROOT.glob("datasets/demo/*/experiment.toml"))
    docs += [tomllib.loads(p.read_text()) for p in demo]
    assert len(docs) >= 3
    for doc in docs:
        assert not list(validator.iter_errors(doc))
    # the schema is not vacuous: the mistakes load_experiment refuses, it refuses too
    for bad in ({"camera": {"focal_lenght_mm": 50}}, {"camra": {}},
                {"geometry": {"object_to_background_m": 1e308}},
                {"reconstruction": {"kind": "axisymetric"}}, {"camera": {"focal_length_mm": "50"}},
                {"medium": {"temperature_c": 20, "temperature_k": 293.15}},
                {"reconstruction": {"reference_region": [0, 10, 5]}}, {"output": {"figures": 1}}):
        assert list(validator.iter_errors(bad)), bad
        with pytest.raises(config.ConfigError):
            config.experiment_from_dict(bad)
