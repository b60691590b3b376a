"""Shared test settings: hypothesis profile sized for a 2-core CI machine; a library key of the tests' own."""

import os
import tempfile
import warnings

from hypothesis import HealthCheck, settings

warnings.filterwarnings("ignore", message=".*Matplotlib.*")

settings.register_profile("ci", max_examples=200, deadline=None,
                          suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
settings.register_profile("dev", max_examples=60, deadline=None,
                          suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "ci"))

# The lab library signs its metadata with a key file (default: in the home folder of the account that
# runs the server). Tests, and every server they start, use a key of their own in a temporary folder.
if not os.environ.get("FRINGEGAUGE_LIBRARY_KEY_FILE"):
    os.environ["FRINGEGAUGE_LIBRARY_KEY_FILE"] = os.path.join(tempfile.mkdtemp(prefix="fringegauge-key-"),
                                                              "library.key")
