"""Every command's output on the sample and the weekly scenario, byte for byte against the stored
golden copy (``tests/cli/golden.py`` says how the copies are made and what is masked)."""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.cli.golden import GOLDEN, golden_path, produce


@pytest.fixture(scope="module")
def outputs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, str]:
    return produce(tmp_path_factory.mktemp("golden"))


def test_every_golden_copy_is_produced_and_nothing_else(outputs: dict[str, str]) -> None:
    stored = {p.name for p in GOLDEN.glob("*.txt")}
    assert stored == {golden_path(name).name for name in outputs}


def test_outputs_are_byte_for_byte_the_golden_copies(outputs: dict[str, str]) -> None:
    changed = [
        name
        for name, text in outputs.items()
        if not golden_path(name).exists() or golden_path(name).read_bytes() != text.encode("utf-8")
    ]
    assert not changed, f"outputs differ from tests/cli/golden: {changed}"


def test_golden_outputs_are_not_empty_and_commands_succeed(outputs: dict[str, str]) -> None:
    for name, text in outputs.items():
        assert text.strip(), name
        if not name.count("/"):
            assert text.startswith("exit 0\n"), (name, text[:400])


def test_the_masks_keep_what_they_should(outputs: dict[str, str]) -> None:
    # Times and the build folder are masked; everything else stays, such as the figures.
    assert "<time>" in outputs["history"]
    assert "<work>" not in outputs["rank-table"]
    assert Path(GOLDEN).is_dir()
