"""Hypothesis profiles.

Locally every run draws new examples (and replays earlier failures from the
``.hypothesis`` database), so the property tests keep exploring. CI sets
``TINYPROP_HYPOTHESIS_PROFILE=ci``: examples derived from each test's name,
so a CI result can be reproduced exactly with the same setting.
"""

from __future__ import annotations

import os

from hypothesis import settings

settings.register_profile("ci", derandomize=True, print_blob=True)
settings.load_profile(os.environ.get("TINYPROP_HYPOTHESIS_PROFILE", "default"))
