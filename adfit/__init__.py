"""adfit: CPTs of a discrete Bayesian network from incomplete records.

The public API is re-exported here; implementation lives in the submodules.
"""

import jax as _jax

# Every number adfit prints is computed in float64.
_jax.config.update("jax_enable_x64", True)

from .errors import AdfitError  # noqa: E402
from .network import Network, Node, load_network, network_from_dict, parse_network  # noqa: E402
from .data import CodedData, encode_frame, load_data, read_table  # noqa: E402

__version__ = "0.1.0"

__all__ = [
    "AdfitError", "Network", "Node", "load_network", "network_from_dict", "parse_network",
    "CodedData", "encode_frame", "load_data", "read_table",
]
