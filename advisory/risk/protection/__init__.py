"""Each protection method's part of a frost plan: :mod:`.wind_machine`, :mod:`.sprinklers` (over-tree
and under-tree), :mod:`.heaters`; what they share (equipment parameters, number words) is
:mod:`.equipment`.  The plan that calls them, with the start and stop times all methods share, is
:func:`advisory.risk.frost.plan_night`.
"""
