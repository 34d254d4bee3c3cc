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


@pytest.fixture(scope="session", autouse=True)
def native_cache(tmp_path_factory):
    """Compiled native steps of this session in a folder of its own (child processes inherit it),
    never the user's cache."""
    import os

    folder = tmp_path_factory.mktemp("native_cache")
    previous = os.environ.get("LINZ_ROS_CACHE")
    os.environ["LINZ_ROS_CACHE"] = str(folder)
    yield folder
    if previous is None:
        os.environ.pop("LINZ_ROS_CACHE", None)
    else:
        os.environ["LINZ_ROS_CACHE"] = previous
