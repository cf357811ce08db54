"""Which roles keep company: co-location per snapshot, persistence over time, cross-K.

The role chain (:mod:`comove.roles.chain`) wires the stages once. Imports
:mod:`comove.tracks` and :mod:`comove.io`, never :mod:`comove.groups` or above.
"""
