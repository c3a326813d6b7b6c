"""Strict settings for every test: float64 available, no silent rank promotion."""
import atexit
import os
import shutil
import tempfile

os.environ.setdefault("XLA_FLAGS", "--xla_force_host_platform_device_count=1")
os.environ.setdefault("MPLBACKEND", "Agg")
# Compiled programs go to a folder of this test session (its subprocesses share it), never
# to the user's cache; tests of the cache itself choose their own folders.
_PROGRAMS = tempfile.mkdtemp(prefix="rnnkit-test-programs-")
atexit.register(shutil.rmtree, _PROGRAMS, ignore_errors=True)
os.environ["RNNKIT_CACHE_DIR"] = _PROGRAMS

import jax  # noqa: E402

import rnnkit  # noqa: E402

# pytest imported rnnkit before this file (the SmallPartWarning filter in pyproject.toml
# names a class of it), so rnnkit chose its folder before the line above: move it here.
rnnkit.compilation_cache(_PROGRAMS)

jax.config.update("jax_enable_x64", True)
jax.config.update("jax_numpy_rank_promotion", "raise")
