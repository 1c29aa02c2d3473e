"""Test-wide settings.

Hypothesis runs derandomized by default so that CI is reproducible; set
CELLPULSE_HYPOTHESIS_PROFILE=explore to search fresh random examples on each run.
"""

from __future__ import annotations

import os

from hypothesis import settings

settings.register_profile("repeatable", derandomize=True, deadline=None)
settings.register_profile("explore", derandomize=False, deadline=None)
settings.load_profile(os.environ.get("CELLPULSE_HYPOTHESIS_PROFILE", "repeatable"))
