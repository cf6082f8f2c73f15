"""The runs: one frost night, frost update, morning check or heat day for a set of blocks.

The stages of a run, shared by every kind: select the blocks due and load their state
(:mod:`.blocks`), forecast and assess (:mod:`.frost_assess`, :mod:`.heat_assess`), compose and store
in one transaction (:mod:`.save`; outbox files written ahead by :mod:`.staging`), deliver
(:mod:`.send`), mark the run (:mod:`.record`).  Each kind of run is a short module naming its
steps: :mod:`.frost_night` (evening and updates; what makes an update news is in
:mod:`.frost_update`), :mod:`.morning_check` (then :mod:`.calibration_refit`), :mod:`.heat_day`
(with :mod:`.heat_check`); :mod:`.planned` is the scheduler's entry.  The models they call
(:mod:`advisory.forecast`, :mod:`advisory.risk`) never touch the database; reports
(:mod:`advisory.reports`) only read and import no run module.

All blocks due together go through the models as arrays in one pass.  The
database work of a batch is one transaction: forecasts, notices and the run
record are committed together, then the notices are delivered (each attempt
logged).  Every forecast, notice and run has an idempotency key, so a night
can be rerun, and the scheduler restarted mid-run, without a notice going out
twice:

* forecast: (block, kind, night, revision) is unique; the evening forecast is
  revision 0 and is never made twice;
* notice: :func:`advisory.notices.notice_data.notice_key` (kind, farm, block, night,
  revision) is unique;
* delivery: a notice already sent to a recipient on a channel is not sent again;
* run: the ``runs`` table records each planned run's key once it is stored and
  again once it is delivered.

Updates through the night re-forecast from the latest observations; a new
notice goes out only when the change is material (:func:`.frost_update.material_change`); a
protection run already under way is carried into the update
(:mod:`advisory.risk.continuity`).

Scale: a run reads what it needs with one query per table (blocks with their
farm, station, recipients and equipment; previous revisions; the notices
behind them; recent verifications), never one per block; forecasts and notices
are written with bulk INSERT statements; the models run on whole arrays, with far
apart time zones in separate passes so that no block is padded with another
continent's night; the notices just stored are delivered from memory, not read
back; Python's cyclic garbage collector is paused during the batch.  Each run
reports the wall time of its stages in :attr:`.record.RunResult.timings`;
``benchmarks/bench_night.py`` measures a night of 10,000 blocks.  For such
numbers of blocks a lean outbox (``ADVISORY_OUTBOX_FORMATS``,
``ADVISORY_OUTBOX_CHARTS`` in :mod:`advisory.settings`) avoids drawing and
writing every notice in every format.
"""
