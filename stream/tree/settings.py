"""What the settings of both trees share: the drift detector registry, the drift checks and
the dict round trip of a frozen settings dataclass."""

from __future__ import annotations

import dataclasses
import math
from typing import Any

from stream.checks import require_choice, require_float, require_int
from stream.errors import ConfigError


DETECTORS = {"adwin": 0, "page_hinkley": 1, "off": 2}
"""Drift detectors by name -> kernel id (the same ids as :data:`stream.tree.drift.DETECTORS`).
``adwin``: ADWIN (Bifet & Gavalda 2007); ``page_hinkley``: the Page-Hinkley test (Page
1954); ``off``: no drift handling (a plain Hoeffding tree)."""


def check_drift_settings(settings: Any) -> None:
    """Check the drift settings both trees share (names, defaults and messages alike)."""
    require_choice("drift detector", settings.detector, DETECTORS)
    require_float("ADWIN delta", settings.adwin_delta, 0.0, 1.0)
    require_float("Page-Hinkley threshold", settings.page_hinkley_threshold, 0.0, math.inf)
    require_int("swap window", settings.swap_after, 1)
    require_float("swap significance", settings.swap_significance, 0.0, 1.0)


RENAMED = {"numeric_observer": "numeric_splits"}
"""Settings renamed since files were first written (old name -> new); files written
before a rename still load."""


class SettingsRecord:
    """``to_dict`` / ``from_dict`` for a settings dataclass; unknown names are refused."""

    def to_dict(self) -> dict:
        return dataclasses.asdict(self)

    @classmethod
    def from_dict(cls, data: dict):
        known = {f.name for f in dataclasses.fields(cls)}
        data = {RENAMED.get(k, k) if RENAMED.get(k) in known else k: v for k, v in data.items()}
        unknown = sorted(set(data) - known)
        if unknown:
            raise ConfigError(f"unknown setting {unknown[0]!r}; known: {', '.join(sorted(known))}")
        return cls(**data)
