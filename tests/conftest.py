"""Fixtures shared by every test folder.

Helpers that tests import directly live beside this file (on the path through
``pythonpath = ["tests"]`` in pyproject.toml): ``treegen.random_tree`` is the one
random-tree generator, ``engine_cases`` holds hypothesis strategies for the engine.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parents[1]

# Compiled models go to a cache of this test session (shared by its subprocesses),
# not to the user's cache; set CLADEWISE_CACHE_DIR to keep one between runs.
os.environ.setdefault("CLADEWISE_CACHE_DIR", tempfile.mkdtemp(prefix="cladewise-test-cache-"))


@pytest.fixture(scope="session")
def repo_root() -> Path:
    """The repository's top folder (found from this file, never a machine's path)."""
    return REPO


@pytest.fixture(scope="session")
def demo_data() -> Path:
    """The invented demo data folder."""
    return REPO / "demo_data"


@pytest.fixture
def rng() -> np.random.Generator:
    """A seeded generator, fresh for each test."""
    return np.random.default_rng(20261202)
