"""Shared test configuration.

Hypothesis runs derandomised by default so that CI is reproducible: the same examples every
run. Set HYPOTHESIS_PROFILE=explore to draw fresh random examples (and more of them).
"""

import os

from hypothesis import settings

settings.register_profile("deterministic", derandomize=True)
settings.register_profile("explore", derandomize=False, max_examples=500)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "deterministic"))
