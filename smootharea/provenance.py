"""Provenance: what produced a result (package versions, input hashes, time)."""
from __future__ import annotations

import hashlib
import platform
from datetime import datetime, timezone
from importlib import metadata
from pathlib import Path

TRACKED_PACKAGES = ("smootharea", "numpy", "scipy", "pandas", "pymc", "pytensor", "nutpie",
                    "arviz", "statsmodels", "geopandas", "libpysal", "esda", "shapely", "pyogrio")


def package_versions() -> dict[str, str]:
    versions = {"python": platform.python_version()}
    for name in TRACKED_PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "not installed"
    return versions


def file_sha256(path: str | Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def utc_now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")
