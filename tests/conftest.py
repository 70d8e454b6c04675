"""Test-suite settings shared by every test file."""

from __future__ import annotations

import os

from hypothesis import settings

# In CI (CI=true) property tests draw their examples from a fixed seed per test, so a run is
# reproducible and a red CI means a real regression; on a developer's machine they keep
# drawing new examples on every run (and remember failures in .hypothesis/), to find new cases.
settings.register_profile("ci", derandomize=True, database=None)
if os.environ.get("CI"):
    settings.load_profile("ci")
