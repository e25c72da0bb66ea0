"""Shared test data builders, imported as ``from tests._fixtures import <module>``."""

from __future__ import annotations

from pathlib import Path

REPO_ROOT = Path(__file__).resolve().parents[2]
"""The repository's top folder (README, configs, pipelines, synthetic scenarios)."""
