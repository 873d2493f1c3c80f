"""JAX's persistent compilation cache for adfit (compiled programs kept on disk between runs).

This module does not import JAX at its top: the command line asks for the cache at start-up
(:func:`request_compilation_cache`) and the cache is switched on when, and only if, a command
imports JAX (``adfit/_jax.py`` calls :func:`on_jax_import`), before its first compilation. A
``--help`` therefore costs no JAX import, and a command that computes still finds its compiled
programs on disk.
"""

from __future__ import annotations

import os

COMPILE_CACHE_MAX_BYTES = 1 << 30

_requested: list[str | None] = []  # the path asked for (None: the default folder), at most one
_in_use: list[str | None] = []


def request_compilation_cache(path: str | None = None) -> None:
    """Switch the persistent compilation cache on as soon as JAX is imported (now if it already
    is, through adfit). Cheap: imports nothing."""
    import sys

    _requested[:] = [path]
    if "adfit._jax" in sys.modules and hasattr(sys.modules["adfit._jax"], "jax"):
        enable_compilation_cache(path)


def on_jax_import(jax) -> None:
    """Called by ``adfit/_jax.py`` once JAX is imported and configured."""
    if _requested and not _in_use:
        enable_compilation_cache(_requested[0], jax=jax)


def enable_compilation_cache(path: str | None = None, *, jax=None) -> str | None:
    """Keep compiled programs on disk between runs (JAX's persistent compilation cache).

    A CLI run on the same network and data layout then skips XLA compilation (tracing is still
    paid). The folder is ``$ADFIT_COMPILE_CACHE`` if set (``0`` or ``off`` disables the cache),
    else ``path``, else ``$XDG_CACHE_HOME/adfit/jax`` (``~/.cache/adfit/jax``); it is created
    readable by the user only (JAX treats the cache as trusted code), entries are kept above
    0.1 s of compile time and, where the ``filelock`` package is installed, the folder is held to
    :data:`COMPILE_CACHE_MAX_BYTES` (least recently used entries go first). An existing
    ``jax_compilation_cache_dir`` setting is kept.
    Call before the first compilation. Returns the folder in use, or None.
    """
    if jax is None:
        from ._jax import jax
    env = os.environ.get("ADFIT_COMPILE_CACHE")
    if env is not None and env.strip().lower() in ("0", "off", "no", "false", ""):
        return None
    if jax.config.jax_compilation_cache_dir:
        _in_use[:] = [jax.config.jax_compilation_cache_dir]
        return jax.config.jax_compilation_cache_dir
    base = env or path or os.path.join(os.environ.get("XDG_CACHE_HOME") or os.path.expanduser("~/.cache"), "adfit", "jax")
    try:
        os.makedirs(base, mode=0o700, exist_ok=True)
    except OSError:
        return None
    jax.config.update("jax_compilation_cache_dir", base)
    jax.config.update("jax_persistent_cache_min_compile_time_secs", 0.1)
    try:  # the size limit needs the filelock package (JAX); without it the folder is not limited
        import filelock  # noqa: F401
        jax.config.update("jax_compilation_cache_max_size", COMPILE_CACHE_MAX_BYTES)
    except ImportError:
        pass
    try:  # JAX decides at its first compilation whether a cache is in use: ask it again
        from jax.experimental.compilation_cache import compilation_cache as _cc
        _cc.reset_cache()
    except Exception:  # pragma: no cover - an older or newer JAX without it: the setting still applies
        pass
    _in_use[:] = [base]
    return base
