"""Shared pytest setup: keep tests off the user's environment."""
from __future__ import annotations

import os

import pytest


@pytest.fixture(autouse=True)
def _clean_fleetwatch_env(monkeypatch):
    """Tests never inherit FLEETWATCH_* settings from the shell that runs them."""
    for key in list(os.environ):
        if key.startswith("FLEETWATCH_"):
            monkeypatch.delenv(key, raising=False)
