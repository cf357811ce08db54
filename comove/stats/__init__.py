"""Is it real: null models, Monte Carlo p- and q-values, and the engine that runs replicates.

Imports the chains of :mod:`comove.roles` and :mod:`comove.groups` and the
layers below them.
"""
