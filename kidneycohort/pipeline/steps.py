"""The library's stages as pipeline steps.

Each step is a small adapter: it takes its tables and typed options from the
:class:`~kidneycohort.pipeline.registry.StepContext`, calls the stage function with
them, and returns the tables it declared. No derivation happens here.
"""

from __future__ import annotations

import logging

from kidneycohort.pipeline.registry import StepRegistry

logger = logging.getLogger(__name__)


def build_registry() -> StepRegistry:
    """A registry holding every library stage as a step."""
    registry = StepRegistry()
    return registry
