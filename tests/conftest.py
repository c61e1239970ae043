"""Shared by every test: nothing is written to the user's own cache folder."""

from __future__ import annotations

from pathlib import Path

import pytest


@pytest.fixture(autouse=True)
def own_cache_folder(
    tmp_path_factory: pytest.TempPathFactory, monkeypatch: pytest.MonkeyPatch
) -> Path:
    """The reopen cache (``triage.core.cache``) of each test in a folder of its own."""
    folder = tmp_path_factory.mktemp("user-cache")
    monkeypatch.setenv("XDG_CACHE_HOME", str(folder))
    return folder
