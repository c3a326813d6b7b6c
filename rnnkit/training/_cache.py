"""Compiled programs kept on disk: jax's persistent compilation cache in a per-user folder.

A fresh process (a restarted kernel, a sweep's worker, the command line) that
trains the same shapes loads the compiled programs instead of compiling them
again (measured here: the first fit of the demo went from about 8 s to under
2 s). It is on by default, in the platform's cache folder:

    Linux    $XDG_CACHE_HOME/rnnkit/programs   (~/.cache/rnnkit/programs)
    macOS    ~/Library/Caches/rnnkit/programs
    Windows  %LOCALAPPDATA%/rnnkit/Cache/programs

``RNNKIT_CACHE_DIR`` moves it (empty or "off" turns it off) and
``compilation_cache(path)`` moves or turns it off in a running process. A
cache the user gave jax itself (``JAX_COMPILATION_CACHE_DIR`` or
``jax_compilation_cache_dir``) is left as it is, unless ``RNNKIT_CACHE_DIR``
names a folder too.

jax's own file store writes an entry in place and keeps a damaged one forever
(each later process warns and compiles again). Ours, plugged in where jax keeps
its store, writes each entry atomically with a checksum in front; a damaged,
half-written or vanished entry reads as a miss, is compiled again and
replaced, and a folder deleted while a process runs is made again. So worker
processes may share the folder, and it may be deleted at any time.
"""
from __future__ import annotations

import hashlib
import logging
import contextlib
import os
import sys
import threading
from pathlib import Path
from typing import Optional, Union

import jax

from ..data._atomic import write_bytes

ENV = "RNNKIT_CACHE_DIR"
_OFF = ("", "off")
# jax writes a program to the cache only if it compiled for at least this long (jax's
# default is 1 s): our evaluation and initial-state programs compile in 0.1-0.6 s, and
# loading one takes a few ms. Programs faster to compile than this (jax's one-operation
# programs) are not worth a file.
MIN_COMPILE_SECONDS = 0.05
_SUFFIX = "-rnnkit"
_DIGEST = 16  # bytes of blake2b in front of each entry

_log = logging.getLogger(__name__)
_state = {"path": None}  # the folder rnnkit installed, or None
_FRESH = threading.local()  # .on: this thread's compiles skip jax's store (see fresh_compiles)


def default_dir() -> Optional[Path]:
    """The folder the cache uses unless told otherwise: ``RNNKIT_CACHE_DIR`` or the platform's.

    Returns None when ``RNNKIT_CACHE_DIR`` is empty or "off".
    """
    env = os.environ.get(ENV)
    if env is not None:
        return None if env.strip().lower() in _OFF else Path(env).expanduser()
    home = Path.home()
    if sys.platform == "win32":
        return Path(os.environ.get("LOCALAPPDATA") or home / "AppData" / "Local") / "rnnkit" / "Cache" \
            / "programs"
    if sys.platform == "darwin":
        return home / "Library" / "Caches" / "rnnkit" / "programs"
    xdg = os.environ.get("XDG_CACHE_HOME", "")
    base = Path(xdg) if os.path.isabs(xdg) else home / ".cache"  # the XDG spec ignores relative paths
    return base / "rnnkit" / "programs"


def _jax_cache_module():
    """jax's compilation-cache module and its store interface, or None if this jax has neither."""
    try:
        from jax._src import compilation_cache as cc
        from jax._src.compilation_cache_interface import CacheInterface
    except ImportError:
        return None, None
    if not all(hasattr(cc, n) for n in ("_cache", "_cache_initialized", "reset_cache")):
        return None, None
    return cc, CacheInterface


_cc, _Interface = _jax_cache_module()


class CheckedFiles(_Interface or object):
    """jax's cache store as one file per program: checksum + jax's bytes, written atomically.

    Every failure to read (no file, a short or damaged one, no folder) is a
    miss, and every failure to write is ignored: the program is compiled as if
    there were no cache.
    """

    def __init__(self, path: Path):
        self._path = Path(path)

    def _file(self, key: str) -> Path:
        return self._path / f"{key}{_SUFFIX}"

    def get(self, key: str) -> Optional[bytes]:
        if getattr(_FRESH, "on", False):
            return None
        try:
            data = self._file(key).read_bytes()
        except OSError:
            return None
        body = data[_DIGEST:]
        if len(data) <= _DIGEST or hashlib.blake2b(body, digest_size=_DIGEST).digest() != data[:_DIGEST]:
            _log.debug("damaged compilation cache entry %s: compiling again", key)
            return None
        return body

    def put(self, key: str, value: bytes) -> bool:
        """Write the entry; False (and nothing else) when it could not be written."""
        if getattr(_FRESH, "on", False):
            return False
        try:
            self._path.mkdir(parents=True, exist_ok=True)
            write_bytes(self._file(key), hashlib.blake2b(value, digest_size=_DIGEST).digest() + value)
        except OSError as e:  # a full disk or a read-only folder costs a compile, nothing else
            _log.debug("compilation cache entry %s not written: %s", key, e)
            return False
        return True

    def clear(self) -> None:
        for f in self._path.glob(f"*{_SUFFIX}"):
            try:
                f.unlink()
            except OSError:
                pass


def store_hooked() -> bool:
    """True when jax's cache store is ours (so ``fresh_compiles`` can keep jax's store out)."""
    return _cc is not None and _state["path"] is not None and isinstance(_cc._cache, CheckedFiles)


@contextlib.contextmanager
def fresh_compiles():
    """In this thread, compile for real: jax's store neither answers nor keeps a program.

    ``_stored`` keeps whole executables; it must serialise one that XLA
    compiled, never one jax loaded from its own store: measured with this jax,
    an executable loaded and serialised again fails when called in the next
    process ("Function ... not found").
    """
    before = getattr(_FRESH, "on", False)
    _FRESH.on = True
    try:
        with _no_store_writes():
            yield
    finally:
        _FRESH.on = before


def _no_store_writes():
    """This thread's compiles skip jax's store write before jax serialises the program
    (jax serialises first and asks the store after: work our store would only refuse)."""
    try:
        from jax._src import config as jax_config

        return jax_config.persistent_cache_min_compile_time_secs(float("inf"))
    except (ImportError, AttributeError, TypeError):
        return contextlib.nullcontext()


def _users_own_cache() -> bool:
    """True when the user pointed jax itself at a cache folder (we then leave jax alone)."""
    if _state["path"] is not None:
        return False  # the folder in jax's config is ours
    return bool(os.environ.get("JAX_COMPILATION_CACHE_DIR") or jax.config.jax_compilation_cache_dir)


def _install(path: Optional[Path]) -> None:
    if _cc is None:  # a jax without the store hook: its own store, still in our folder
        jax.config.update("jax_compilation_cache_dir", None if path is None else str(path))
    else:
        _cc.reset_cache()
        jax.config.update("jax_compilation_cache_dir", None if path is None else str(path))
        if path is not None:
            with _cc._cache_initialized_mutex:
                _cc._cache = CheckedFiles(path)
                _cc._cache_initialized = True
    if path is not None:
        jax.config.update("jax_persistent_cache_min_compile_time_secs", MIN_COMPILE_SECONDS)
        jax.config.update("jax_persistent_cache_min_entry_size_bytes", -1)  # no size floor
    _state["path"] = path


_ASK = object()


def compilation_cache(path: Union[str, os.PathLike, bool, None] = _ASK) -> Optional[Path]:
    """Keep compiled programs on disk in ``path``, so a restarted process skips compiling them.

    Args:
      path: a folder (made when needed); True: the default folder (``RNNKIT_CACHE_DIR``,
        else the platform's cache folder, e.g. ~/.cache/rnnkit/programs on Linux);
        None or False: off for the rest of this process (compiled programs stay in memory);
        left out: nothing changes (the call only tells the folder).

    Returns:
      The folder now in use, or None when rnnkit's cache is off.

    The folder may be deleted at any time: what is missing is compiled again.
    Worker processes of ``rnnkit.sweep`` use the same folder.

    Example:
      >>> rnnkit.compilation_cache()                       # where it is now
      >>> rnnkit.compilation_cache("/scratch/me/rnnkit-programs")
      >>> rnnkit.compilation_cache(None)                   # off
    """
    if path is _ASK:
        return _state["path"]
    if path is True:
        target = default_dir()
    elif path is None or path is False:
        target = None
    elif isinstance(path, (str, os.PathLike)):
        if not str(path).strip():
            raise ValueError("`path` (='') must name a folder; pass None or False to turn the cache off")
        target = Path(path).expanduser()
    else:
        raise TypeError(f"`path` (={path!r}) must be a folder (str or Path), True for the default "
                        "folder, or None/False to turn the cache off")
    _install(target)
    return target


def cache_dir() -> Optional[Path]:
    """The folder rnnkit keeps compiled programs in now, or None (off, or the user's own jax cache)."""
    return _state["path"]


def switch_on_default() -> None:
    """At import: ``RNNKIT_CACHE_DIR`` if it names a folder, else the platform's folder, unless
    the user set up jax's cache themselves (then jax is left alone)."""
    env = os.environ.get(ENV)
    named = env is not None and env.strip().lower() not in _OFF
    if named or not _users_own_cache():
        _install(default_dir())
