"""Strict settings for every test: float64 available, no silent rank promotion."""
import os

os.environ.setdefault("XLA_FLAGS", "--xla_force_host_platform_device_count=1")
os.environ.setdefault("MPLBACKEND", "Agg")

import jax  # noqa: E402

jax.config.update("jax_enable_x64", True)
jax.config.update("jax_numpy_rank_promotion", "raise")
