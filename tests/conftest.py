"""Shared pytest fixtures: where the outside reference data lives."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

#: tests/reference: frozen copies of the published reference data (sources in its README.md).
REFERENCE_DIR = Path(__file__).resolve().parent / "reference"


@pytest.fixture(scope="session")
def reference_dir() -> Path:
    """Folder of the published reference data (NIST StRD, worked examples)."""
    return REFERENCE_DIR


@pytest.fixture(scope="session")
def published_examples(reference_dir: Path) -> dict:
    """The parsed ``published_examples.json`` (each entry names its source)."""
    return json.loads((reference_dir / "published_examples.json").read_text(encoding="utf-8"))
