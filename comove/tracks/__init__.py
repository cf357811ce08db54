"""Tracks made comparable: cleaning, alignment on common snapshots, neighbour pairs, motion.

Imports :mod:`comove.io` and nothing above it.
"""
