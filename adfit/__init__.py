"""adfit: CPTs of a discrete Bayesian network from records with gaps and latent nodes.

The public API is re-exported here; implementation lives in the submodules. The names are
loaded on first use (PEP 562), so ``import adfit`` and the command line's ``--help`` import
neither pandas nor JAX. JAX, with float64 switched on, comes in through ``adfit/_jax.py``, which
every module that computes with it imports first.
"""

from __future__ import annotations

import importlib

__version__ = "0.1.0"

#: public name -> submodule that defines it
_EXPORTS = {
    "AdfitError": "errors",
    "Network": "network", "Node": "network", "load_network": "network", "network_from_dict": "network",
    "parse_network": "network",
    "CodedData": "data", "encode_frame": "data", "load_data": "data", "read_table": "data",
}

__all__ = list(_EXPORTS)


def __getattr__(name: str):
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'adfit' has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{module}", __name__), name)
    globals()[name] = value  # once loaded, a plain attribute
    return value


def __dir__() -> list[str]:
    return sorted({*globals(), *__all__})
