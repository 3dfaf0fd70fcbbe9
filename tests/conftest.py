"""Test configuration: float64 everywhere, and hypothesis settings suited to jit compilation."""

import jax
from hypothesis import HealthCheck, settings

jax.config.update("jax_enable_x64", True)

# jit compilation makes first calls slow: no per-example deadline; modest example counts.
settings.register_profile(
    "psiloom", deadline=None, max_examples=25, suppress_health_check=[HealthCheck.too_slow]
)
settings.load_profile("psiloom")
