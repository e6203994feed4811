"""Installed versions of the packages that decide results, for run records and cache keys."""

from __future__ import annotations

from importlib import metadata


def package_versions(names: tuple[str, ...]) -> dict[str, str]:
    """``{name: version}`` for each installed distribution; ``"absent"`` for one that is not installed."""
    out = {}
    for name in names:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "absent"
    return out
