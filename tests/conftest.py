"""Shared test settings: hypothesis profile sized for a 2-core CI machine."""

import os
import warnings

from hypothesis import HealthCheck, settings

warnings.filterwarnings("ignore", message=".*Matplotlib.*")

settings.register_profile("ci", max_examples=200, deadline=None,
                          suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
settings.register_profile("dev", max_examples=60, deadline=None,
                          suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "ci"))
