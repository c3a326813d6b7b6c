"""Compiled programs kept whole on disk: a restarted process neither traces nor lowers them again.

jax's persistent cache (``_cache``) skips XLA's compile, but every fresh
process still traces the Python function and lowers it to a module before it
can even look the program up: for the epoch program of the default fit that is
about 0.6 s, and the first lowering of a process pays about 0.35 s more for
setting itself up. ``StoredProgram`` wraps a jitted function and keeps, per
call signature, the compiled executable itself (``jax.stages.Compiled``):

  in memory   the first call of a signature compiles (or loads) it once;
  on disk     in the cache folder of ``_cache`` (the same folder, the same
              checked atomic entries), keyed by the program's static key, the
              call signature (tree structure, shapes, dtypes, weak types), the
              jax settings that change tracing, and a fingerprint of this
              installation: jax and jaxlib versions, the device, XLA_FLAGS,
              this CPU's model and flags, and a digest of rnnkit's own source
              files, so an edited rnnkit or another machine never loads a
              program built from other code.

A damaged, stale or unreadable entry is a miss: the program is compiled (jax's
own cache still helps there) and the entry written again. With the cache off
(``compilation_cache(None)``, ``RNNKIT_CACHE_DIR=off``) only the memory part
is used; with ``jax_disable_jit`` the function runs as plain Python.

Safety: loading an entry runs machine code that was compiled into it, as
loading jax's own cache entries does. Keep the folder yours (the default, in
your home, is), never a folder other people can write to.
"""
from __future__ import annotations

import functools
import hashlib
import logging
import os
import pickle
import platform
import re
import threading
from pathlib import Path
from typing import Callable, Dict, Optional

import jax

from . import _cache

_log = logging.getLogger(__name__)
_PREFIX = "whole-"  # file names: whole-<digest>-rnnkit, beside jax's entries
_FORMAT = 2  # bump when what an entry holds changes
_COUNTS = {"loaded": 0, "compiled": 0, "written": 0}  # this process, all programs
_COUNT_LOCK = threading.Lock()
_FINGERPRINT: Dict[str, str] = {}


ENV = "RNNKIT_WHOLE_PROGRAMS"


def on_disk() -> bool:
    """True when ``RNNKIT_WHOLE_PROGRAMS=1``: programs are kept whole in the cache folder too.

    Off by default: the whole test suite in one process (hundreds of programs
    compiled, serialised and some loaded, torch loaded beside jax) crashed
    inside XLA's compiler late in the run, reproducibly, with this on, and not
    with it off; the cause is not found yet. Off, compiled programs are kept in
    memory here and on disk by jax's own cache (``_cache``), as before.
    """
    return os.environ.get(ENV, "").strip() == "1"


def counts() -> Dict[str, int]:
    """Programs of this process: loaded from the folder, compiled, written to it."""
    with _COUNT_LOCK:
        return dict(_COUNTS)


def _bump(name: str) -> None:
    with _COUNT_LOCK:
        _COUNTS[name] += 1


def _source_digest() -> str:
    """Digest of every .py file of the installed rnnkit (a changed line makes new keys)."""
    root = Path(__file__).resolve().parent.parent
    h = hashlib.blake2b(digest_size=16)
    for f in sorted(root.rglob("*.py")):
        h.update(str(f.relative_to(root)).encode())
        try:
            h.update(f.read_bytes())
        except OSError:
            h.update(b"?")
    return h.hexdigest()


def _cpu() -> str:
    """This CPU's model and feature flags (compiled code uses the features it finds)."""
    try:
        with open("/proc/cpuinfo", encoding="utf-8", errors="replace") as f:
            lines = [ln for ln in f if ln.startswith(("model name", "flags", "Features", "CPU part"))]
        return "".join(sorted(set(lines)))
    except OSError:
        return f"{platform.machine()} {platform.processor()}"


def fingerprint() -> str:
    """What the compiled programs of this installation depend on, besides their own key."""
    if not _FINGERPRINT:
        import jaxlib

        device = jax.devices()[0]
        parts = [jax.__version__, getattr(jaxlib, "__version__", "?"), device.platform,
                 getattr(device, "device_kind", "?"), getattr(device.client, "platform_version", "?"),
                 os.environ.get("XLA_FLAGS", ""), _cpu(), _source_digest(), str(_FORMAT)]
        _FINGERPRINT["value"] = hashlib.blake2b("\x00".join(parts).encode(), digest_size=16).hexdigest()
    return _FINGERPRINT["value"]


def _settings() -> tuple:
    """The jax settings that change what a trace gives (read at call time: x64 may be per thread)."""
    c = jax.config
    return (bool(c.jax_enable_x64), str(c.jax_default_matmul_precision), str(c.jax_numpy_dtype_promotion),
            str(c.jax_numpy_rank_promotion), bool(c.jax_threefry_partitionable), str(c.jax_default_prng_impl),
            bool(c.jax_debug_nans), bool(c.jax_debug_infs))


def _leaf_type(x) -> tuple:
    t = jax.typeof(x)
    return (tuple(t.shape), str(t.dtype), bool(getattr(t, "weak_type", False)))


class StoredProgram:
    """A jitted function whose compiled forms are kept per call signature, in memory and on disk.

    Called like the jitted function (positional arguments only); returns the same values.

    Args:
      jitted: the ``jax.jit`` of the function.
      key: the static choices the function was built from (part of every disk key).
    """

    def __init__(self, jitted: Callable, key: tuple):
        self._jitted = jitted
        self.__wrapped__ = getattr(jitted, "__wrapped__", jitted)  # the Python function
        self._key = repr(key)
        self._compiled: dict = {}
        self._lock = threading.Lock()

    def __call__(self, *args):
        if jax.config.jax_disable_jit:
            return self._jitted(*args)
        leaves, tree = jax.tree.flatten(args)
        sig = (tree, tuple(_leaf_type(x) for x in leaves), _settings())
        fn = self._compiled.get(sig)
        if fn is None:
            with self._lock:
                fn = self._compiled.get(sig)
                if fn is None:
                    fn = self._compiled[sig] = self._obtain(args, sig)
        return fn(*args)

    def lower(self, *args):
        """The jitted function's ``lower`` (for inspection; not stored)."""
        return self._jitted.lower(*args)

    def _entry(self, sig) -> str:
        tree, leaf_types, settings = sig
        text = "\x00".join([self._key, str(tree), repr(leaf_types), repr(settings), fingerprint()])
        return _PREFIX + hashlib.blake2b(text.encode(), digest_size=20).hexdigest()

    def _obtain(self, args, sig):
        """The Compiled for ``sig``: loaded from the folder (checked by its first call), else compiled."""
        folder = _cache.cache_dir() if _cache.store_hooked() and on_disk() else None
        store = _cache.CheckedFiles(folder) if folder is not None else None
        entry = self._entry(sig) if store is not None else None
        if store is not None:
            loaded = _load(store, entry)
            if loaded is not None:
                _bump("loaded")
                return _FirstCallChecked(loaded, lambda: self._compile(args, store, entry))
        return self._compile(args, store, entry)

    def _compile(self, args, store, entry):
        if store is None:
            compiled = self._jitted.lower(*args).compile()
            _bump("compiled")
            return compiled
        with _cache.fresh_compiles():  # an executable jax loaded cannot be kept (see fresh_compiles)
            compiled = self._jitted.lower(*args).compile()
        _bump("compiled")
        if _save(store, entry, compiled):
            _bump("written")
        return compiled


class _FirstCallChecked:
    """A loaded program whose first call runs to the end before it is trusted.

    A loaded entry that cannot run (built by another jax, a damaged executable)
    fails on its first call; that call is then made again with a program
    compiled afresh (``recompile``), which also replaces the entry. Calls are
    only made asynchronous again once one has succeeded.
    """

    def __init__(self, loaded, recompile: Callable):
        self._fn = loaded
        self._recompile = recompile
        self._trusted = False

    def __call__(self, *args):
        if self._trusted:
            return self._fn(*args)
        try:
            out = jax.block_until_ready(self._fn(*args))
        except Exception as e:  # noqa: BLE001 - any failure of a loaded program: compile it afresh
            _log.debug("stored program failed on its first call (%s: %s): compiling again",
                       type(e).__name__, e)
            self._fn = self._recompile()
            out = self._fn(*args)
        self._trusted = True
        return out


def _load(store, entry: str):
    """The Compiled in ``entry``, or None (no entry, a damaged one, or one this jax cannot load)."""
    data = store.get(entry)
    if data is None:
        return None
    try:
        from jax.experimental import serialize_executable

        needs_lapack, payload, in_tree, out_tree = pickle.loads(data)
        if needs_lapack:  # jax sets LAPACK up when it lowers a linear-algebra op; nothing was lowered
            from jax._src.lax import linalg

            linalg.initialize_lapack()
        return serialize_executable.deserialize_and_load(payload, in_tree, out_tree)
    except Exception as e:  # noqa: BLE001 - any unreadable entry is a miss, compiled again
        _log.debug("stored program %s not loaded (%s: %s): compiling again", entry, type(e).__name__, e)
        return None


def _save(store, entry: str, compiled) -> bool:
    try:
        from jax.experimental import serialize_executable

        targets = set(re.findall(r'custom_call_target="([^"]+)"', compiled.as_text()))
        unknown = sorted(t for t in targets if not t.startswith("lapack_"))
        if unknown:  # a call into the host (a Python callback, a library) may not survive a restart
            _log.debug("stored program %s not written: it calls %s", entry, unknown)
            return False
        payload, in_tree, out_tree = serialize_executable.serialize(compiled)
        data = pickle.dumps((bool(targets), payload, in_tree, out_tree), protocol=pickle.HIGHEST_PROTOCOL)
    except Exception as e:  # noqa: BLE001 - a program that cannot be serialised is only not kept
        _log.debug("stored program %s not written (%s: %s)", entry, type(e).__name__, e)
        return False
    return store.put(entry, data)


def stored(jitted: Callable, key: tuple) -> StoredProgram:
    """``StoredProgram(jitted, key)``."""
    return StoredProgram(jitted, key)


def stored_jit(*, static_argnames: tuple = (), **jit_options):
    """Decorator: like ``partial(jax.jit, static_argnames=...)``, each static choice a StoredProgram.

    The decorated function takes its array arguments by position and its static
    arguments (hashable) by keyword; every distinct set of static values gets its
    own StoredProgram, keyed by the function's module, name and those values.
    """
    def wrap(fn):
        programs: dict = {}
        lock = threading.Lock()
        name = (fn.__module__, fn.__qualname__)

        @functools.wraps(fn)
        def call(*args, **kwargs):
            unknown = sorted(set(kwargs) - set(static_argnames))
            if unknown:
                raise TypeError(f"{fn.__qualname__}() takes {unknown} by position, not by keyword")
            static = tuple(sorted(kwargs.items()))
            program = programs.get(static)
            if program is None:
                with lock:
                    program = programs.get(static)
                    if program is None:
                        jitted = jax.jit(functools.partial(fn, **kwargs), **jit_options)
                        program = programs[static] = StoredProgram(jitted, name + static)
            return program(*args)

        return call

    return wrap
