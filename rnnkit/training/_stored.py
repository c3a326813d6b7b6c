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

How many are kept at once. A compiled program holds memory mappings of its
machine code (a fit's three programs, about 600 on this jax), and Linux lets one
process hold 65,530 by default (``vm.max_map_count``); a process past that
crashes inside XLA. A long notebook
session or a sweep in one process meets every shape once, so the programs of
this process are kept to ``KEPT`` compiled forms in all: past it, the program
used longest ago lets all of its compiled forms go (its jitted function is
built afresh, so jax's own caches, keyed on that function, let them go too).
A program needed again is loaded from the folder or compiled again.

Safety: loading an entry runs machine code that was compiled into it, as
loading jax's own cache entries does. Keep the folder yours (the default, in
your home, is), never a folder other people can write to.
"""
from __future__ import annotations

import functools
import hashlib
import itertools
import logging
import os
import pickle
import platform
import re
import threading
import weakref
from pathlib import Path
from typing import Callable, Dict, Optional

import jax

from . import _cache

_log = logging.getLogger(__name__)
_PREFIX = "whole-"  # file names: whole-<digest>-rnnkit, beside jax's entries
_FORMAT = 2  # bump when what an entry holds changes
_COUNTS = {"loaded": 0, "compiled": 0, "written": 0, "dropped": 0}  # this process, all programs
_COUNT_LOCK = threading.Lock()
_FINGERPRINT: Dict[str, str] = {}

# Compiled forms kept by all programs of this process at once (see the module's docstring).
# Measured on this jax: about 200 memory mappings per training program; with no bound the
# full test suite in one process reached 64,609 mappings (of 65,530) and crashed once a few
# more programs were compiled. 64 forms: about 13,000 mappings, several fits' worth.
KEPT = 64
_PROGRAMS: "weakref.WeakSet[StoredProgram]" = weakref.WeakSet()
_PROGRAMS_LOCK = threading.Lock()
_CLOCK = itertools.count()  # last-use stamps


ENV = "RNNKIT_WHOLE_PROGRAMS"


def on_disk() -> bool:
    """True unless ``RNNKIT_WHOLE_PROGRAMS=0``: programs are kept whole in the cache folder too.

    Off, compiled programs are kept in memory here and on disk by jax's own
    cache only (``_cache``): a fresh process then traces and lowers them again.
    """
    return os.environ.get(ENV, "").strip() != "0"


def counts() -> Dict[str, int]:
    """Programs of this process: loaded from the folder, compiled, written to it, and let go
    ("dropped") to stay within ``KEPT``; "held" is how many compiled forms are kept now."""
    with _COUNT_LOCK:
        out = dict(_COUNTS)
    with _PROGRAMS_LOCK:
        out["held"] = sum(len(p._compiled) for p in list(_PROGRAMS))
    return out


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
      build: makes the ``jax.jit`` of the function, each call a new one (a program
        that lets its compiled forms go builds its jitted function again).
      key: the static choices the function was built from (part of every disk key).
    """

    def __init__(self, build: Callable[[], Callable], key: tuple):
        self._build = build
        self._made = None  # the jitted function, made when first needed (see _jitted)
        self._key = repr(key)
        self._compiled: dict = {}
        self._used = next(_CLOCK)
        self._lock = threading.Lock()
        with _PROGRAMS_LOCK:
            _PROGRAMS.add(self)

    @property
    def _jitted(self):
        """The jitted function, made on first use: a program loaded whole never needs it
        (nor what building it imports: optax for the training programs, about 0.07 s)."""
        made = self._made
        if made is None:
            made = self._made = self._build()
        return made

    @property
    def __wrapped__(self):
        """The Python function."""
        return getattr(self._jitted, "__wrapped__", self._jitted)

    def __call__(self, *args):
        if jax.config.jax_disable_jit:
            return self._jitted(*args)
        leaves, tree = jax.tree.flatten(args)
        sig = (tree, tuple(_leaf_type(x) for x in leaves), _settings())
        self._used = next(_CLOCK)
        fn = self._compiled.get(sig)
        if fn is None:
            with self._lock:
                fn = self._compiled.get(sig)
                if fn is None:
                    fn = self._obtain(args, sig)
                    self._compiled[sig] = fn
            _keep_within(self, sig, fn)
        return fn(*args)

    def _drop(self, keep: Optional[tuple] = None) -> int:
        """Let every compiled form go (but ``keep``: (sig, fn)); the number let go.

        Replaces objects without taking this program's lock: a call compiling in
        another thread keeps its own references and stores its result in the new dict.
        The jitted function goes too (jax's caches are keyed on it); it is made again
        when next needed.
        """
        gone = len(self._compiled) - (keep is not None)
        self._made = None
        self._compiled = {keep[0]: keep[1]} if keep is not None else {}
        return gone

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
                # the recompile takes the failing call's arguments: holding the first call's
                # here would keep its arrays (the whole series) alive as long as the program
                return _FirstCallChecked(loaded, lambda *a: self._compile(a, store, entry))
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
    compiled afresh (``recompile(*args)``), which also replaces the entry. Calls are
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
            self._fn = self._recompile(*args)
            out = self._fn(*args)
        self._trusted = True
        self._recompile = None
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


def _keep_within(program: StoredProgram, sig, fn) -> None:
    """After ``program`` compiled ``sig``: past ``KEPT`` compiled forms in this process, the
    programs used longest ago let theirs go; ``program`` itself keeps at least ``sig``."""
    with _PROGRAMS_LOCK:
        programs = [p for p in list(_PROGRAMS) if p._compiled]
        held = sum(len(p._compiled) for p in programs)
        if held <= KEPT:
            return
        dropped = 0
        for p in sorted((p for p in programs if p is not program), key=lambda p: p._used):
            if held <= KEPT:
                break
            n = p._drop()
            held -= n
            dropped += n
        if held > KEPT:  # this program alone holds more: it keeps the form just made
            n = program._drop(keep=(sig, fn))
            held -= n
            dropped += n
    with _COUNT_LOCK:
        _COUNTS["dropped"] += dropped
    _log.debug("kept programs: %d compiled forms let go, %d held", dropped, held)


def _jit_of(fn, kwargs, jit_options):
    return jax.jit(functools.partial(fn, **kwargs), **jit_options)  # a new function object each time


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
                        build = functools.partial(_jit_of, fn, kwargs, jit_options)
                        program = programs[static] = StoredProgram(build, name + static)
            return program(*args)

        return call

    return wrap
