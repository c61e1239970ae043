"""The command line's scoring options come from the setting declarations
(``triage.core.settings``): one default, one check and one help text for every command that
offers them, and the review screens start from the same values. Common practice."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

import pytest

from triage.cli import _review_options, build_parser, main
from triage.core.settings import (
    LAG,
    REPEAT,
    SETTINGS,
    TARGET_SHARE,
    WINDOW,
    ScoreSettings,
    Setting,
)

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample" / "portfolio.csv"


@pytest.fixture(autouse=True)
def no_user_config(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """No configuration file unless a test writes one (the user config folder is empty)."""
    monkeypatch.setenv("XDG_CONFIG_HOME", str(tmp_path / "config-home"))
    return tmp_path


def _subcommands() -> dict[str, argparse.ArgumentParser]:
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return dict(sub.choices)


def _setting_options() -> list[tuple[str, argparse.Action, Setting[Any]]]:
    """Every (command, option, setting) pair of the parser."""
    found = []
    for name, command in _subcommands().items():
        for action in command._actions:
            for setting in SETTINGS:
                if set(action.option_strings) & set(setting.flags):
                    found.append((name, action, setting))
    return found


def test_every_command_offers_the_settings_as_declared() -> None:
    found = _setting_options()
    commands = {name for name, _, _ in found}
    assert {"rank", "check", "review", "decide", "report", "demo", "export"} <= commands
    for name, action, setting in found:
        where = f"{name} {action.option_strings[0]}"
        # The parser holds only what was typed; the declaration's default applies later.
        assert action.default is None, where
        assert action.type is setting.convert, where
        assert action.metavar == setting.metavar, where
        if (name, action.option_strings[0]) == ("rank", "--cover"):
            # rank's --cover limits the listing; its example is the declared default.
            assert f"(e.g. {TARGET_SHARE.shown()})" in (action.help or ""), where
        else:
            assert action.help == setting.help_text, where


@pytest.mark.parametrize(
    "argv",
    [
        ["rank", str(SAMPLE)],
        ["check", str(SAMPLE)],
        ["review", str(SAMPLE)],
        ["decide", str(SAMPLE), "--from", "batch.csv"],
        ["report", str(SAMPLE)],
        ["demo"],
    ],
)
def test_nothing_given_is_the_declared_defaults(argv: list[str]) -> None:
    args = build_parser().parse_args(argv)
    assert ScoreSettings.from_args(args) == ScoreSettings()


def test_given_options_reach_the_settings() -> None:
    args = build_parser().parse_args(
        [
            "report",
            str(SAMPLE),
            "--window",
            "8",
            "--season",
            "4",
            "--cover",
            "0.5",
            "--repeat",
            "2/6",
            "--lag",
            "1",
        ]
    )
    assert ScoreSettings.from_args(args) == ScoreSettings(8, 4, 0.5, (2, 6), 1)


def test_review_screens_start_from_the_declarations() -> None:
    from triage.tui.app import Options

    assert Options(portfolio=SAMPLE).settings == ScoreSettings()
    args = build_parser().parse_args(["review", str(SAMPLE), "--reviewer", "ana"])
    assert _review_options(args, SAMPLE, None).settings == ScoreSettings()


def test_review_target_share_from_the_config_unless_given(no_user_config: Path) -> None:
    config = no_user_config / "config.toml"
    config.write_text("target_share = 0.6\n", encoding="utf-8")
    base = ["review", str(SAMPLE), "--reviewer", "ana", "--config", str(config), "--window", "5"]
    options = _review_options(build_parser().parse_args(base), SAMPLE, None)
    assert options.settings == ScoreSettings(window=5, target_share=0.6)
    given = build_parser().parse_args([*base, "--target", "0.9", "--lag", "2"])
    assert _review_options(given, SAMPLE, None).settings == ScoreSettings(5, 1, 0.9, (3, 4), 2)


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["rank", "{sample}", "--window", "0"], "--window must be at least 1, not 0."),
        (["check", "{sample}", "--season", "0"], "--season must be at least 1, not 0."),
        (
            ["rank", "{sample}", "--window", "20000"],
            "--window counts periods: at most 10,000, not 20000.",
        ),
        (
            ["rank", "{sample}", "--cover", "1.5"],
            "--cover must be a fraction in (0, 1], e.g. 0.8, not 1.5.",
        ),
        (
            ["report", "{sample}", "--cover", "1.5"],
            "--cover must be a fraction in (0, 1], e.g. 0.8, not 1.5.",
        ),
        (
            ["review", "{sample}", "--target", "0"],
            "--target must be a fraction in (0, 1], e.g. 0.8, not 0.0.",
        ),
        (["report", "{sample}", "--repeat", "5/4"], "--repeat 5/4: N must be between 1 and M."),
        (
            ["report", "{sample}", "--repeat", "three"],
            "--repeat must be N/M, e.g. 3/4, not 'three'.",
        ),
    ],
)
def test_bad_values_exit_2_naming_the_option(
    argv: list[str], message: str, capsys: pytest.CaptureFixture[str]
) -> None:
    code = main([a.replace("{sample}", str(SAMPLE)) for a in argv])
    err = capsys.readouterr().err
    assert code == 2
    assert err.splitlines()[0] == f"triage: {message}"


def test_help_writes_the_declared_defaults(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit):
        main(["report", "--help"])
    out = " ".join(capsys.readouterr().out.split())
    for setting in (WINDOW, TARGET_SHARE, REPEAT, LAG):
        assert " ".join(setting.help_text.split()) in out
    assert "(default 13)" in out and "(default 3/4)" in out and "else 0.8)" in out


def test_reopen_cache_options_of_review_and_demo(capsys: pytest.CaptureFixture[str]) -> None:
    """``--no-cache`` and ``--cache-limit`` (declared once: ``settings.CACHE_LIMIT_MB``) reach
    the review screens' options; a negative limit is refused with exit 2, naming the option."""
    from triage.core.settings import CACHE_LIMIT_MB

    for command in (["review", str(SAMPLE)], ["demo"]):
        args = build_parser().parse_args([*command, "--reviewer", "ana"])
        options = _review_options(args, SAMPLE, None)
        assert options.cache and options.cache_limit_mb == CACHE_LIMIT_MB.default
        args = build_parser().parse_args(
            [*command, "--reviewer", "ana", "--no-cache", "--cache-limit", "100"]
        )
        options = _review_options(args, SAMPLE, None)
        assert not options.cache and options.cache_limit_mb == 100
    assert main(["review", str(SAMPLE), "--reviewer", "ana", "--cache-limit", "-1"]) == 2
    assert "--cache-limit" in capsys.readouterr().err
