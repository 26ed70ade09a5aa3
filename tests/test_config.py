"""Config: every shipped config loads; bad keys, types and ranges are named with their path."""

from pathlib import Path

import pytest

from tamis.config import BuildConfig, ConfigError, config_from_dict, load_config, require_paths, with_overrides

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
        ({"regions": {"max_region_fpr": 1.5}}, r"max_region_fpr must be a rate in \(0, 1\]"),
        ({"regions": {"max_region_fpr": 0}}, r"max_region_fpr must be a rate in \(0, 1\]"),
        ({"regions": {"filter_kinds": ["bloom", "cuckoo"]}}, r"filter_kinds must be a non-empty selection"),
    ],
)
def test_bad_values_name_their_key(raw, message):
    with pytest.raises(ConfigError, match=message):
        config_from_dict(raw, Path("."))


def test_region_cap_and_filter_kinds_are_read():
    config = config_from_dict({"regions": {"max_region_fpr": 0.1, "filter_kinds": ["bloom"]}}, Path("."))
    assert config.regions.max_region_fpr == 0.1 and config.regions.filter_kinds == ("bloom",)
    assert config_from_dict({}, Path(".")).regions.max_region_fpr == 1.0  # no cap by default


def test_missing_paths_say_which_option_to_pass():
    with pytest.raises(ConfigError, match="--members"):
        require_paths(BuildConfig())


def test_overrides_replace_only_given_values():
    config = with_overrides(BuildConfig(), target={"fpr": 0.05}, corpus={"members": None})
    assert config.target.fpr == 0.05 and config.corpus == BuildConfig().corpus
    with pytest.raises(ConfigError, match="option --target-fpr must be between"):
        with_overrides(BuildConfig(), target={"fpr": 2.0})


def test_unreadable_and_malformed_files(tmp_path):
    with pytest.raises(ConfigError, match="cannot read config"):
        load_config(tmp_path / "absent.toml")
    (tmp_path / "bad.toml").write_text("[corpus\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(tmp_path / "bad.toml")


def test_gate_limits_read_zero_as_off_and_check_their_ranges():
    gate = BuildConfig().gate
    # on by default for a nightly build: +50% bytes, 20% fewer members against the version in service
    assert (gate.max_size_growth, gate.max_member_drop, gate.min_heldout, gate.max_artifact_bytes) == (0.5, 0.2, 0, 0)
    config = config_from_dict({"gate": {"max_size_growth": 0, "max_member_drop": 0.35, "min_heldout": 2000}}, Path("."))
    assert (config.gate.max_size_growth, config.gate.max_member_drop, config.gate.min_heldout) == (0.0, 0.35, 2000)
    with pytest.raises(ConfigError, match=r"gate\.max_member_drop must be between 0\.0 and 1\.0"):
        config_from_dict({"gate": {"max_member_drop": 1.5}}, Path("."))
    with pytest.raises(ConfigError, match=r"gate\.max_size_growth must be between"):
        config_from_dict({"gate": {"max_size_growth": -0.1}}, Path("."))
    with pytest.raises(ConfigError, match=r"gate\.min_heldout must be an integer"):
        config_from_dict({"gate": {"min_heldout": 1.5}}, Path("."))


def test_the_demo_turns_the_change_limits_off_and_the_nightly_example_keeps_the_defaults():
    demo = load_config(CONFIGS / "demo.toml").gate
    assert (demo.max_size_growth, demo.max_member_drop) == (0.0, 0.0)
    assert load_config(CONFIGS / "nightly.example.toml").gate == BuildConfig().gate
