"""Suite-wide test settings.

Property tests are derandomised (hypothesis draws the same examples on every run) so that
a CI run is reproducible; explore more widely by hand with
``HYPOTHESIS_PROFILE=explore python -m pytest``.
"""

from __future__ import annotations

import os

from hypothesis import settings

settings.register_profile("kidneycohort", derandomize=True, deadline=None, print_blob=True)
settings.register_profile("explore", derandomize=False, deadline=None, max_examples=300)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "kidneycohort"))
