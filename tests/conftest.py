"""Test-wide settings.

Hypothesis runs derandomized by default so that CI is reproducible; set
CELLPULSE_HYPOTHESIS_PROFILE=explore to search fresh random examples (many more of them).
"""

from __future__ import annotations

import os

from hypothesis import settings

settings.register_profile("repeatable", derandomize=True, deadline=None)
settings.register_profile("explore", derandomize=False, deadline=None, max_examples=1500)
settings.load_profile(os.environ.get("CELLPULSE_HYPOTHESIS_PROFILE", "repeatable"))
