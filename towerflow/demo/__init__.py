"""The invented demo network: simulated sites with known truth and their logger exports.

Everything this package makes is invented: no real site, place or measurement.
"""
from __future__ import annotations

from .network import DEMO_SITES, simulate_demo_network, write_demo_network
from .simulate import SITE_KINDS, SimulatedSite, simulate_site

__all__ = [
    "DEMO_SITES",
    "SITE_KINDS",
    "SimulatedSite",
    "simulate_demo_network",
    "simulate_site",
    "write_demo_network",
]
