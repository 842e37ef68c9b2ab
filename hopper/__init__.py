"""hopper: answer chained questions over a fact table with a learned, audited fetch policy.

The public API is small: open a store, then ``load``, ``train``, ``ask``, ``evaluate`` and
``audit``.  Heavy libraries (torch, sentence-transformers) are imported only by the verbs
that need them, so ``import hopper`` is cheap.
"""
from __future__ import annotations

__version__ = "0.1.0"

from .errors import HopperError, InputError  # noqa: E402


def open_store(path=None):
    """Open (or name, for a later ``load``) the hopper store at ``path``.

    ``path`` defaults to ``$HOPPER_STORE``, else ``./hopper.duckdb``.
    """
    from .api import Hopper

    return Hopper(path)


__all__ = ["open_store", "HopperError", "InputError", "__version__"]
