"""Placeholder until the settings owner lands (replaced on merge)."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class ScoreSettings:
    window: int = 13
    season: int = 1
    target_share: float = 0.8
    repeat: tuple[int, int] = (3, 4)
    lag: int | None = None
