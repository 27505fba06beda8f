"""The fuzzing budget: the default run keeps CI's added time small; set
``LIVEFILT_FUZZ_SCALE`` (e.g. 20) for a longer search on a quiet machine."""

import os

from hypothesis import HealthCheck, settings

SCALE = max(0.01, float(os.environ.get("LIVEFILT_FUZZ_SCALE", "1")))


def examples(n: int) -> settings:
    """Hypothesis settings with ``n`` examples times the budget scale."""
    return settings(max_examples=max(1, int(n * SCALE)), deadline=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
