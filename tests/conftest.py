"""Shared fixtures: paths of the bundled and reference plants, and a plant-file writer."""

from __future__ import annotations

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
BUNDLED = ROOT / "config" / "plants"
REFERENCE = Path(__file__).resolve().parent / "plants"


@pytest.fixture
def write_plant(tmp_path):
    """Write plant-file text to a temporary file and return its path."""

    def _write(text: str, name: str = "plant.yaml") -> Path:
        path = tmp_path / name
        path.write_text(text)
        return path

    return _write


MINIMAL = """\
plant: demo
states: [x1, x2]
inputs: [u]
parameters: {k: 2.0}
dynamics:
  x1: x2
  x2: -k*sin(x1) + u
"""
