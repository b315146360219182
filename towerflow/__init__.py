"""towerflow: weekly eddy-covariance processing for flux-tower networks."""
from __future__ import annotations

try:
    from importlib.metadata import version as _version

    __version__ = _version("towerflow")
except Exception:  # pragma: no cover - running from a source tree without installation
    __version__ = "0.1.0"
