"""Hypothesis settings shared by the fuzz modules: reproducible, no time limit."""

from __future__ import annotations

from hypothesis import HealthCheck, settings


def fuzz_settings(max_examples: int) -> settings:
    """Derandomized settings (the same cases every run) with ``max_examples`` cases."""
    return settings(max_examples=max_examples, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                           HealthCheck.function_scoped_fixture])
