"""The run sheet of a farm summary: which blocks, which method, start and stop, in order.
"""

from __future__ import annotations

from typing import Any

from advisory.assessment import Assessment
from advisory.notices import words as w
from advisory.notices.notice_parts import _finite, _Fmt


def _runsheet(a0: Assessment, ok: list[Assessment], f: _Fmt) -> tuple[dict[str, Any], list[str]]:
    """The crew run sheet from :mod:`advisory.risk.runsheet` (its three renderings and our table rows)."""
    from advisory.risk import runsheet as rs

    made = [x.reference_time_utc for x in ok if x.reference_time_utc is not None]
    sheet = rs.build_run_sheet(a0.farm, a0.night, a0.farm_tz, ok,
                               generated_utc=max(made) if made else None,  # an update's: its own time
                               units="imperial" if w.imperial(a0.units) else "metric")
    rows = []
    for r in sheet.rows:
        p = r.plan
        amounts = []
        for attr, key in (("run_hours", "hours"), ("water_m3", "water_m3"), ("fuel_l", "fuel_l")):
            v = getattr(p, attr, None)
            if _finite(v):
                amounts.append(f"{w.quantity_label(key)} {w.quantity(key, v, f.units)}")
        rows.append({
            "order": r.order, "block": r.risk.block, "method": w.method_name(p.method),
            "ready_by": f.clock(r.ready_by) if r.ready_by else "",
            "start": f.clock(r.start) if r.start else "",
            "stop": (("not before " if p.stop_open else "") + f.clock(r.stop)) if r.stop else "",
            "amounts": "; ".join(amounts),
            "low": f"{f.t(r.risk.min_p50_c)} ({f.rng(r.risk.min_p10_c, r.risk.min_p90_c)})",
        })
    out = {"rows": rows, "unprotected": [r.block for r in sheet.unprotected],
           "text": rs.render_text(sheet), "csv": rs.render_csv(sheet)}
    return out, list(sheet.caution_keys)
