"""Input and output: reading tracks, times and coordinate systems, results folders, run files.

The lowest layer: it imports nothing else of comove but :mod:`comove.errors`.
"""
