"""Test configuration: float64 everywhere, and hypothesis settings suited to jit compilation."""

import jax
from hypothesis import HealthCheck, settings

jax.config.update("jax_enable_x64", True)

# jit compilation makes first calls slow: no per-example deadline; modest example counts.
settings.register_profile(
    "psiloom", deadline=None, max_examples=25, suppress_health_check=[HealthCheck.too_slow]
)
settings.load_profile("psiloom")

# A persistent compilation cache in the user's cache folder: a second run of the suite on the
# same machine reuses the compiled programs (PSILOOM_TEST_NO_CACHE=1 turns it off).
import os  # noqa: E402

if not os.environ.get("PSILOOM_TEST_NO_CACHE"):
    from psiloom.compilation import enable_compilation_cache  # noqa: E402

    enable_compilation_cache()
