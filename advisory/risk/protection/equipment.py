"""What the protection methods share: a block's equipment by kind, its parameters read as
numbers within bounds, and the small number words of the plans' notes.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

from advisory.errors import InputError
from advisory.risk.frost_data import METHODS


def _equipment_by_kind(equipment: Sequence[Mapping]) -> dict[str, dict]:
    out: dict[str, dict] = {}
    for e in equipment or ():
        kind = str(e.get("kind", "")).strip().lower().replace("-", "_").replace(" ", "_")
        if kind not in METHODS:
            raise InputError(f"unknown equipment kind {e.get('kind')!r}; choose one of: {', '.join(METHODS)}",
                             field="kind")
        params = dict(e.get("params") or {})
        params.update({k: v for k, v in e.items() if k not in ("kind", "params")})
        if kind in out:  # two entries of one kind: add rates, keep the rest of the first
            for key in ("rate_mm_h", "water_supply_m3", "fuel_l_per_h_per_ha", "fuel_stock_l"):
                if key in params and key in out[kind]:
                    out[kind][key] = float(out[kind][key]) + float(params[key])
            continue
        out[kind] = params
    return out


def _num(params: Mapping, key: str, lo: float = 0.0, hi: float = 1e9) -> float | None:
    v = params.get(key)
    if v is None:
        return None
    try:
        f = float(v)
    except (TypeError, ValueError):
        raise InputError(f"equipment {key} must be a number", field=key) from None
    if not (math.isfinite(f) and lo <= f <= hi):
        raise InputError(f"equipment {key} must be between {lo:g} and {hi:g}", field=key)
    return f


def _share(have: float, need: float) -> str:
    """How much of a need a system covers, e.g. "93 %" (floored, so "100 %" means the need is met)."""
    return f"{math.floor(100.0 * have / need + 1e-9):.0f} %" if need > 0 else "all"


def _c(value_c: float) -> str:
    """A temperature to one decimal, for the texts of a plan (never "-0.0")."""
    s = f"{value_c:.1f}"
    return "0.0" if s == "-0.0" else s
