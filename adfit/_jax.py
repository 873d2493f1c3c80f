"""The one place adfit imports JAX.

Every module of adfit that computes with JAX imports it from here::

    from ._jax import jax, jnp

so that float64 is switched on before any adfit array exists, whichever module is imported
first (every number adfit prints is computed in float64). Nothing else in the package imports
``jax`` directly (tests/test_cli_speed.py checks), and the package itself (``import adfit``) and
the command line's ``--help`` do not import JAX at all: only the work does.

A persistent compilation cache asked for before JAX was imported
(:func:`adfit._compile_cache.request_compilation_cache`, as the command line does) is switched on
here, before the first compilation.
"""

import jax
import jax.numpy as jnp

jax.config.update("jax_enable_x64", True)

from . import _compile_cache  # noqa: E402  (jax-free; it needs the configured jax)

_compile_cache.on_jax_import(jax)

__all__ = ["jax", "jnp"]
