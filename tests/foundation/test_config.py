"""Configuration: documented defaults, one clear error naming the bad key."""

import tomllib

import pytest

from tracker.config import ConfigError, config_from_dict, default_config_text, load_config


def test_defaults_round_trip_through_the_written_file(tmp_path):
    (tmp_path / "tracker.toml").write_text(default_config_text())
    assert load_config(tmp_path) == config_from_dict({})
    # RiskMetrics (1996) decays are the documented defaults.
    cfg = load_config(tmp_path)
    assert cfg.models.ewma_decay_daily == 0.94 and cfg.models.ewma_decay_monthly == 0.97


@pytest.mark.parametrize(
    "text, key",
    [
        ("[models]\nregimes = 5\n", "[models] regimes"),
        ("[models]\newma_decay_daily = 'fast'\n", "[models] ewma_decay_daily"),
        ("[ingest]\nwarn_sigma = -1\n", "[ingest] warn_sigma"),
        ("[models]\nnot_a_key = 1\n", "[models] not_a_key"),
        ("[nonsense]\nx = 1\n", "[nonsense]"),
        ("[models]\nvolatility = 'magic'\n", "[models] volatility"),
    ],
)
def test_bad_values_name_the_key(tmp_path, text, key):
    (tmp_path / "tracker.toml").write_text(text)
    with pytest.raises(ConfigError) as info:
        load_config(tmp_path)
    assert key in str(info.value)
    assert "\n" not in str(info.value)


def test_invalid_toml_is_one_line(tmp_path):
    (tmp_path / "tracker.toml").write_text("[models\nregimes = 2")
    with pytest.raises(ConfigError, match="invalid TOML"):
        load_config(tmp_path)


def test_default_file_is_valid_toml():
    parsed = tomllib.loads(default_config_text())
    assert set(parsed) >= {"store", "ingest", "models", "assets", "ui"}


@pytest.mark.parametrize(
    "text, key",
    [
        ("[warnings]\nmultiple_testing_method = 'bonferroni'\n", "[warnings] multiple_testing_method"),
        ("[warnings]\nnoise_band_level = 2.0\n", "[warnings] noise_band_level"),
        ("[warnings]\nhurdle_t = 'high'\n", "[warnings] hurdle_t"),
    ],
)
def test_warning_thresholds_are_validated_too(tmp_path, text, key):
    (tmp_path / "tracker.toml").write_text(text)
    with pytest.raises(ConfigError) as info:
        load_config(tmp_path)
    assert key in str(info.value)


def test_warning_threshold_reaches_the_rules(tmp_path):
    (tmp_path / "tracker.toml").write_text("[warnings]\nhurdle_t = 2.5\n")
    assert load_config(tmp_path).warnings.hurdle_t == 2.5
