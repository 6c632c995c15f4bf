"""Shared test settings: screens are laid out without a width limit unless a test
sets ``COLUMNS`` itself (a developer's exported COLUMNS must not change results)."""

from __future__ import annotations

import pytest


@pytest.fixture(autouse=True)
def _no_inherited_columns(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("COLUMNS", raising=False)
