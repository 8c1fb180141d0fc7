"""Compiled engines on arrays: persistence pairs, regions, flow routing.

Everything here takes arrays and returns arrays; nothing opens a path or
knows about runs, files or the command line.
"""
