"""Which objects travel together: links, per-snapshot groups, episodes, dyads, presets.

The group chain (:mod:`comove.groups.chain`) wires the stages once. Imports
:mod:`comove.tracks` and :mod:`comove.io`, never :mod:`comove.roles` or above.
"""
