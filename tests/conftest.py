"""Test configuration shared by the whole suite.

float64 everywhere (tolerances are tied to it: 1e-10 relative for kernels against dense
references), rank promotion raises, matmuls at "highest", and JAX's persistent compilation cache so
repeated CI runs on a 2-core machine skip recompiling. The planner's machine rates are kept in a
file under the temporary directory, never in the user's cache (`ntkcalc._engine.rates`);
subprocesses inherit the setting.
"""

import os
import tempfile

os.environ.setdefault("XLA_FLAGS", "")
os.environ.setdefault("MPLBACKEND", "Agg")
os.environ.setdefault("NTKCALC_RATES_FILE",
                      os.path.join(tempfile.gettempdir(), "ntkcalc-test-rates.json"))

import jax  # noqa: E402

jax.config.update("jax_enable_x64", True)
jax.config.update("jax_numpy_rank_promotion", "raise")
jax.config.update("jax_default_matmul_precision", "highest")
_cache = os.environ.get(
    "NTKCALC_TEST_JAX_CACHE", os.path.join(os.path.expanduser("~"), ".cache", "ntkcalc-jax-tests")
)
jax.config.update("jax_compilation_cache_dir", _cache)
jax.config.update("jax_persistent_cache_min_compile_time_secs", 0.5)
jax.config.update("jax_persistent_cache_min_entry_size_bytes", 0)
