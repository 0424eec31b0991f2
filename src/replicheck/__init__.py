"""replicheck: screen a finished experimental dataset for pseudo-replication and confounding."""

from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["__version__", "audit"]


def __getattr__(name: str) -> object:
    if name == "audit":
        from replicheck.api import audit

        return audit
    raise AttributeError(name)
