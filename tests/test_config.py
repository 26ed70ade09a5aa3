"""Config: every shipped config loads; bad keys, types and ranges are named with their path."""

from pathlib import Path

import pytest

from pipeline.config import BuildConfig, ConfigError, config_from_dict, load_config, require_paths, with_overrides

CONFIGS = Path(__file__).resolve().parent.parent / "configs"


@pytest.mark.parametrize("name", ["demo.toml", "nightly.example.toml"])
def test_shipped_configs_load(name):
    config = load_config(CONFIGS / name)
    assert 0 < config.target.fpr < 1


def test_relative_paths_resolve_against_the_config_folder(tmp_path):
    (tmp_path / "c.toml").write_text('[corpus]\nmembers = "in/m.txt"\nnon_members = "n.txt"\n[store]\npath = "s"\n')
    config = load_config(tmp_path / "c.toml")
    assert config.corpus.members == tmp_path / "in" / "m.txt"
    require_paths(config)


@pytest.mark.parametrize(
    "raw, message",
    [
        ({"corpus": {"membres": "x"}}, r"unknown config key corpus\.membres"),
        ({"targets": {}}, r"unknown config table \[targets\]"),
        ({"target": {"fpr": "1%"}}, r"target\.fpr must be a finite number"),
        ({"target": {"fpr": 0.9}}, r"target\.fpr must be between"),
        ({"corpus": {"conflicts": "drop"}}, r"corpus\.conflicts must be one of 'member', 'error'"),
        ({"model": {"leaves": 7}}, r"model\.leaves must be a non-empty list"),
        ({"model": {"threads": 1.5}}, r"model\.threads must be an integer"),
        ({"corpus": {"validation_share": 0.6, "heldout_share": 0.6}}, r"leave at least 0\.1"),
    ],
)
def test_bad_values_name_their_key(raw, message):
    with pytest.raises(ConfigError, match=message):
        config_from_dict(raw, Path("."))


def test_missing_paths_say_which_option_to_pass():
    with pytest.raises(ConfigError, match="--members"):
        require_paths(BuildConfig())


def test_overrides_replace_only_given_values():
    config = with_overrides(BuildConfig(), target={"fpr": 0.05}, corpus={"members": None})
    assert config.target.fpr == 0.05 and config.corpus == BuildConfig().corpus
    with pytest.raises(ConfigError, match="target.fpr must be between"):
        with_overrides(BuildConfig(), target={"fpr": 2.0})


def test_unreadable_and_malformed_files(tmp_path):
    with pytest.raises(ConfigError, match="cannot read config"):
        load_config(tmp_path / "absent.toml")
    (tmp_path / "bad.toml").write_text("[corpus\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(tmp_path / "bad.toml")
