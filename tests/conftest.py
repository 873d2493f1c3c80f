"""Test configuration: float64 everywhere, loud dtype/rank promotion, the shared examples importable."""

import os
import sys

sys.path.insert(0, os.path.dirname(__file__))

import jax  # noqa: E402

jax.config.update("jax_enable_x64", True)
