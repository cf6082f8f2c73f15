"""Heaters: fuel for the run from the rate per hectare (or per heater) and the stock on hand.
"""

from __future__ import annotations

from advisory.risk.protection.equipment import _num


def heater_plan(params, area: float, run_h: float | None, run_k: float | None, kw: dict,
                notes: list[str]) -> None:
    """Heaters' part of a plan (:func:`advisory.risk.frost._method_plan`): fuel for the run and the
    stock on hand into ``kw`` and ``notes``."""
    per_ha = _num(params, "fuel_l_per_h_per_ha")
    if per_ha is None:
        n_ha = _num(params, "heaters_per_ha")
        per_h = _num(params, "fuel_l_per_h_per_heater")
        per_ha = n_ha * per_h if n_ha is not None and per_h is not None else None
    stock = _num(params, "fuel_stock_l")
    if per_ha is not None:
        fuel = per_ha * area * run_h if run_h is not None else None
        fuel_k = per_ha * area * run_k if run_k is not None else None
        kw.update(fuel_l=fuel, fuel_l_cold=fuel_k)
        need = fuel_k if fuel_k is not None else fuel
        if stock is not None and need is not None and need > stock:
            notes.append(f"Fuel on hand ({stock:.0f} L) is less than the {need:.0f} L the run needs.")
    else:
        notes.append("Fuel rate not recorded; fuel use unknown.")
