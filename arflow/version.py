"""The project's distribution name and installed version (one home for both)."""

from __future__ import annotations

from importlib import metadata

#: the project's distribution name on package indexes (the import package and the command are ``arflow``)
DISTRIBUTION = "arflow-gated"


def arflow_version() -> str:
    """Installed package version (``0+unknown`` when run from a bare checkout)."""
    try:
        return metadata.version(DISTRIBUTION)
    except metadata.PackageNotFoundError:
        return "0+unknown"
