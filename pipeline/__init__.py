"""towerflow's science: pure functions over numpy arrays and pandas frames.

Nothing in this package imports Prefect or matplotlib, and only :mod:`pipeline.ingest`
and :mod:`pipeline.config` / :mod:`pipeline.rules` read files.
"""
