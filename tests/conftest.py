"""Shared fixtures (the importable helpers live in support.py, a name no other folder uses)."""

from __future__ import annotations

from pathlib import Path

import pytest


@pytest.fixture
def write_plant(tmp_path):
    """Write plant-file text to a temporary file and return its path."""

    def _write(text: str, name: str = "plant.yaml") -> Path:
        path = tmp_path / name
        path.write_text(text)
        return path

    return _write
