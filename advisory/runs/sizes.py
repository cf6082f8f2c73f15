"""From how many blocks a run shares its work among forked processes (:mod:`advisory.forking`).

Read as ``sizes.NAME`` by the runs, so that one setting holds for every step that forks.
"""

from __future__ import annotations

#: A run for at least this many blocks has their outbox files written ahead (see :class:`advisory.runs.staging._Staging`).
STAGE_OUTBOX_FROM = 2000

#: A run with at least this many blocks shares its forecasting and composing among
#: ``settings.workers`` processes (see :func:`advisory.runs.frost_night._assess_prepared`
#: and :func:`advisory.runs.save._store`).
PARALLEL_FROM_BLOCKS = 2000
