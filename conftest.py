"""Settings shared by the whole test suite.

Hypothesis draws new examples on every run; under CI the draws are fixed
(``derandomize``) so a red run can be reproduced, and no per-example deadline applies on
a loaded 2-core machine (speed is measured by the benchmark scripts, not by tests).
"""

from __future__ import annotations

import os

from hypothesis import settings

settings.register_profile("ci", derandomize=True, deadline=None, print_blob=True)
settings.register_profile("dev", deadline=None)
settings.load_profile("ci" if os.environ.get("CI") else "dev")
