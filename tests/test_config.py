"""Config loading: validation, near-match messages, path resolution."""

from pathlib import Path

import pytest

from msdkit.config import config_from_dict, config_hash, load_config
from msdkit.errors import ConfigError


def _write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "run.yaml"
    p.write_text(text)
    return p


def test_minimal_config_gets_working_defaults(tmp_path):
    cfg = load_config(_write(tmp_path, "inputs: [a.tif]\n"))
    assert cfg.sample.temperature_c == 25.0
    assert cfg.sample.medium == "water"
    assert cfg.executor.kind == "local"
    assert cfg.detection.spot_diameter_px is None  # chosen from the movie


def test_unknown_key_is_named_with_its_nearest_valid_key(tmp_path):
    p = _write(tmp_path, "inputs: [a.tif]\nacquisition:\n  pixel_size_umm: 0.1\n")
    expected = r"run\.yaml: acquisition\.pixel_size_umm: unknown key \(did you mean 'pixel_size_um'\?\)"
    with pytest.raises(ConfigError, match=expected):
        load_config(p)


def test_unknown_section_is_named(tmp_path):
    with pytest.raises(ConfigError, match=r"detecton: unknown key \(did you mean 'detection'\?\)"):
        load_config(_write(tmp_path, "inputs: [a.tif]\ndetecton: {}\n"))


def test_out_of_range_value_names_the_key(tmp_path):
    with pytest.raises(ConfigError, match=r"acquisition\.pixel_size_um: .*greater than 0"):
        load_config(_write(tmp_path, "inputs: [a.tif]\nacquisition: {pixel_size_um: -0.1}\n"))


def test_wrong_type_names_the_key(tmp_path):
    with pytest.raises(ConfigError, match=r"sample\.temperature_c"):
        load_config(_write(tmp_path, "inputs: [a.tif]\nsample: {temperature_c: warm}\n"))


def test_exposure_longer_than_frame_interval_is_rejected_with_the_fix(tmp_path):
    text = "inputs: [a.tif]\nacquisition: {frame_interval_s: 0.01, exposure_s: 0.02}\n"
    with pytest.raises(ConfigError, match="exposure_s must be <= frame_interval_s"):
        load_config(_write(tmp_path, text))


def test_missing_inputs_is_reported(tmp_path):
    with pytest.raises(ConfigError, match="inputs: required key is missing"):
        load_config(_write(tmp_path, "output_dir: out\n"))


def test_invalid_yaml_and_missing_file_are_config_errors(tmp_path):
    with pytest.raises(ConfigError, match="not valid YAML"):
        load_config(_write(tmp_path, "inputs: [a.tif\n"))
    with pytest.raises(ConfigError, match="config file not found"):
        load_config(tmp_path / "nope.yaml")


def test_relative_paths_resolve_against_the_config_folder(tmp_path):
    sub = tmp_path / "movies"
    sub.mkdir()
    for name in ("b.tif", "a.tif"):
        (sub / name).write_bytes(b"")
    cfg = load_config(_write(tmp_path, "inputs: ['movies/*.tif', movies/a.tif]\noutput_dir: out\n"))
    assert [p.name for p in cfg.input_paths()] == ["a.tif", "b.tif"]  # sorted, duplicates removed
    assert cfg.output_path() == tmp_path / "out"


def test_fixed_medium_viscosity_form_is_accepted():
    cfg = config_from_dict({"inputs": ["a.tif"], "sample": {"medium": {"viscosity_mpa_s": 3.0}}})
    assert cfg.sample.medium.viscosity_mpa_s == 3.0


def test_config_hash_ignores_output_folder_and_executor_but_not_physics():
    a = config_from_dict({"inputs": ["a.tif"], "output_dir": "x"})
    b = config_from_dict({"inputs": ["a.tif"], "output_dir": "y", "executor": {"kind": "serial"}})
    c = config_from_dict({"inputs": ["a.tif"], "sample": {"temperature_c": 26.0}})
    assert config_hash(a) == config_hash(b)
    assert config_hash(a) != config_hash(c)
