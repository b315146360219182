"""Rule sets as data. ``standard.toml`` is the network standard.

The TOML files are package data, read through :mod:`importlib.resources`, so they are
found however towerflow is installed.
"""
