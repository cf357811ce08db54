"""Showing results: figures and the HTML report of a results folder.

Reads results only through the results-folder module
(:mod:`comove.io.results`); imports nothing of the analysis layers.
"""
