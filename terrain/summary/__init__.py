"""Summaries of finished runs as data frames: feature tables and polygons, catchments.

Pure analysis: these functions take a :class:`terrain.runner.RunResult`
and return tables; writing them is :mod:`terrain.outputs`' job.
"""
