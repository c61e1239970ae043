"""Each scoring setting is declared once (``triage.core.settings``): every place that offers it
starts from the declaration, and a bad value gets the option's message. Common practice."""

from __future__ import annotations

import argparse
import dataclasses
from pathlib import Path

import pytest

from triage.core import settings
from triage.core.config import Config, ConfigError, load_config
from triage.core.errors import TriageError
from triage.core.settings import REPEAT, SEASON, SETTINGS, TARGET_SHARE, WINDOW, ScoreSettings


def test_score_settings_defaults_are_the_declarations() -> None:
    fields = {f.name: f.default for f in dataclasses.fields(ScoreSettings)}
    assert fields == {s.name: s.default for s in SETTINGS}
    assert ScoreSettings() == ScoreSettings(13, 1, 0.8, (3, 4), None)


def test_config_default_is_the_declaration() -> None:
    assert Config().target_share == TARGET_SHARE.default


def test_ranking_defaults_are_the_declarations() -> None:
    import inspect

    from triage.core.ranking import scorecard

    params = inspect.signature(scorecard).parameters
    assert params["window"].default == WINDOW.default
    assert params["season"].default == SEASON.default


def test_the_old_unused_settings_class_is_gone() -> None:
    from triage.core import ranking

    assert not hasattr(ranking, "ScoreSettings")


def test_help_carries_the_default() -> None:
    assert WINDOW.help_text == "latest periods with actual demand to score (default 13)"
    assert REPEAT.help_text.endswith("(default 3/4)")
    assert TARGET_SHARE.help_text.endswith("(default: config, else 0.8)")


def _args(**given: object) -> argparse.Namespace:
    return argparse.Namespace(**given)


def test_from_args_takes_what_was_given() -> None:
    args = _args(window=8, season=4, cover=0.5, repeat="2/6", lag=1)
    assert ScoreSettings.from_args(args) == ScoreSettings(8, 4, 0.5, (2, 6), 1)


def test_from_args_target_share_comes_from_the_config_when_not_given(tmp_path: Path) -> None:
    file = tmp_path / "config.toml"
    file.write_text("target_share = 0.6\n", encoding="utf-8")
    config = load_config(file)
    assert ScoreSettings.from_args(_args(target=None), config).target_share == 0.6
    assert ScoreSettings.from_args(_args(target=0.9), config).target_share == 0.9
    # Without a configuration, and for a command without the options: the declarations.
    assert ScoreSettings.from_args(_args()) == ScoreSettings()


@pytest.mark.parametrize(
    ("given", "message"),
    [
        ({"window": 0}, "--window must be at least 1, not 0."),
        ({"season": -2}, "--season must be at least 1, not -2."),
        ({"window": 10_001}, "--window counts periods: at most 10,000, not 10001."),
        ({"cover": 1.5}, "--cover must be a fraction in (0, 1], e.g. 0.8, not 1.5."),
        ({"cover": float("nan")}, "--cover must be a fraction in (0, 1], e.g. 0.8, not nan."),
        ({"target": 0.0}, "--target must be a fraction in (0, 1], e.g. 0.8, not 0.0."),
        ({"repeat": "5/4"}, "--repeat 5/4: N must be between 1 and M."),
        ({"repeat": "three"}, "--repeat must be N/M, e.g. 3/4, not 'three'."),
        ({"repeat": "0/4"}, "--repeat 0/4: N must be between 1 and M."),
    ],
)
def test_bad_values_name_the_option(given: dict[str, object], message: str) -> None:
    with pytest.raises(TriageError) as caught:
        ScoreSettings.from_args(_args(**given))
    assert caught.value.message == message


def test_config_share_rule_is_the_settings_rule(tmp_path: Path) -> None:
    file = tmp_path / "config.toml"
    for value in ("0", "1.5", "nan", "inf", "-0.2"):
        file.write_text(f"target_share = {value}\n", encoding="utf-8")
        with pytest.raises(ConfigError, match="must be above 0 and at most 1"):
            load_config(file)
        assert not settings.is_share(float(value))
    file.write_text("target_share = 1\n", encoding="utf-8")
    assert load_config(file).target_share == 1.0
