"""Does protecting a block tonight pay?  The cost-loss decision, for many blocks at once.

Pure and vectorised over blocks: no database, no network.

Cost-loss model
---------------
A user who can protect at cost ``C`` against a loss ``L`` that happens with
probability ``p`` minimises the expected expense by protecting exactly when
``p > C / L`` (Thompson 1952 [1]_; Murphy 1977 [2]_).  Protection here is not
perfect and the loss not all-or-nothing, so the rule is applied in its
expected-value form: protect when the expected loss avoided,
``E[loss without] - E[loss with]``, exceeds the cost of running the method.
With a perfect method and an all-or-nothing loss it reduces to ``p > C / L``
(:func:`cost_loss_protect`).

Expected loss
-------------
The damage distribution is that of :mod:`advisory.risk.frost`: the bud kill
at the night's effective exposure temperature, the minimum plus an offset
(sustained minimum and duration), averaged over the forecast distribution of
the minimum (equal-probability quantiles).  Protection lifts the exposure by
the method's protection in °C, so the distribution is shifted by it.  The
loss is the expected kill fraction times the crop value of the block (value
per hectare times area); a block or method without values gets no figures
(NaN), never a guess.

Cost of a night: the method's running cost per hour times the hours it runs,
plus its fixed cost per night.

References
----------
.. [1] Thompson, J. C. (1952) On the operational deficiencies in categorical
   weather forecasts. Bull. Amer. Meteor. Soc. 33, 223-226.
.. [2] Murphy, A. H. (1977) The value of climatological, categorical and
   probabilistic forecasts in the cost-loss ratio situation. Mon. Wea. Rev.
   105, 803-816.
.. [3] Katz, R. W., Murphy, A. H. & Winkler, R. L. (1982) Assessing the value
   of frost forecasts to orchardists. J. Appl. Meteor. 21, 518-531 (citation
   details from memory).
.. [4] Snyder, R. L. & de Melo-Abreu, J. P. (2005) Frost Protection:
   fundamentals, practice and economics, vol. 1/2. FAO (economics of
   protection; citation details from memory).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from advisory.risk.damage import kill_fraction


def cost_loss_protect(p_loss, cost, loss):
    """The cost-loss rule: protect when the probability of loss exceeds C/L.

    Parameters
    ----------
    p_loss : array_like
        Probability that the loss happens without protection [0-1].
    cost : array_like
        Cost of protecting (in the farm's currency).
    loss : array_like
        Loss avoided by protecting when the event happens (same currency).

    Returns
    -------
    ndarray of bool
        True where ``p_loss > cost / loss``; False where ``loss <= 0``.

    References
    ----------
    .. [1] Thompson (1952); [2] Murphy (1977).
    """
    p, c, big_l = (np.asarray(a, float) for a in (p_loss, cost, loss))
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(big_l > 0, c / np.where(big_l > 0, big_l, 1.0), np.inf)
    out = p > ratio
    return bool(out) if out.ndim == 0 else out


def expected_kill(min_quantiles_c, offset_c, t10_c, t90_c, protection_c=0.0):
    """Expected bud kill over the forecast distribution of the minimum, optionally shifted by protection.

    Parameters
    ----------
    min_quantiles_c : array_like, shape (n, k)
        Equal-probability quantiles of each block's night minimum [°C] (for
        example ``MinTempForecast.quantiles((arange(k) + 0.5) / k)``).
    offset_c : array_like, shape (n,)
        Effective exposure temperature minus the night minimum [°C]
        (``DamageArrays.sustained_offset_c - DamageArrays.duration_shift_c``;
        0 to use the minimum itself).
    t10_c, t90_c : array_like, shape (n,)
        Critical temperatures [°C].
    protection_c : array_like, shape (n,) or scalar
        Rise of the bud temperature the method gives [°C] (0 = unprotected).

    Returns
    -------
    ndarray, shape (n,)
        Expected killed fraction [0-1].
    """
    q = np.atleast_2d(np.asarray(min_quantiles_c, float))
    n = q.shape[0]
    off = np.broadcast_to(np.asarray(offset_c, float), (n,))
    lift = np.broadcast_to(np.asarray(protection_c, float), (n,))
    t10 = np.broadcast_to(np.asarray(t10_c, float), (n,))[:, None]
    t90 = np.broadcast_to(np.asarray(t90_c, float), (n,))[:, None]
    return kill_fraction(q + (off + lift)[:, None], t10, t90).mean(axis=1)


@dataclass(frozen=True)
class NightEconomics:
    """Expected losses and costs for one night, all arrays shape (n,), in the farm's currency.

    NaN where a block lacks a value it needs (crop value, or the method's
    costs or protection).

    Attributes
    ----------
    loss_without, loss_with : ndarray
        Expected loss without and with protection.
    running_cost : ndarray
        Cost of running the method tonight (hourly cost x hours + fixed cost).
    saving : ndarray
        ``loss_without - loss_with - running_cost``: the expected net gain of protecting.
    pays : ndarray of bool
        Protecting pays (``saving > 0``); False where NaN.
    """

    loss_without: np.ndarray
    loss_with: np.ndarray
    running_cost: np.ndarray
    saving: np.ndarray
    pays: np.ndarray


def night_economics(min_quantiles_c, offset_c, t10_c, t90_c, protection_c, crop_value_per_ha, area_ha,
                    running_cost_per_h, run_hours, fixed_cost_per_night) -> NightEconomics:
    """Expected loss without and with protection, the running cost, and whether protecting pays.

    Parameters
    ----------
    min_quantiles_c : array_like, shape (n, k)
        Equal-probability quantiles of the night minimum [°C].
    offset_c : array_like, shape (n,)
        Effective exposure minus minimum [°C] (see :func:`expected_kill`).
    t10_c, t90_c : array_like, shape (n,)
        Critical temperatures of the recorded stage [°C].
    protection_c : array_like, shape (n,)
        The method's protection [°C]; NaN where unknown.
    crop_value_per_ha : array_like, shape (n,)
        Value of the crop [currency/ha]; NaN where not given.
    area_ha : array_like, shape (n,)
        [ha].
    running_cost_per_h : array_like, shape (n,)
        Running cost of the method on the block [currency/h] (fuel, water,
        power, labour); NaN where not given.
    run_hours : array_like, shape (n,)
        Hours the method would run tonight [h] (the plan's run hours).
    fixed_cost_per_night : array_like, shape (n,)
        Fixed cost of a night's run [currency]; 0 where there is none.

    Returns
    -------
    NightEconomics

    References
    ----------
    .. [1] Thompson (1952); [2] Murphy (1977); [3] Katz et al. (1982).
    """
    value = np.asarray(crop_value_per_ha, float) * np.asarray(area_ha, float)
    k0 = expected_kill(min_quantiles_c, offset_c, t10_c, t90_c, 0.0)
    lift = np.asarray(protection_c, float)
    k1 = expected_kill(min_quantiles_c, offset_c, t10_c, t90_c, np.where(np.isfinite(lift), lift, 0.0))
    k1 = np.where(np.isfinite(lift), k1, np.nan)
    cost = (np.asarray(running_cost_per_h, float) * np.asarray(run_hours, float)
            + np.nan_to_num(np.asarray(fixed_cost_per_night, float), nan=0.0))
    loss0 = value * k0
    loss1 = value * k1
    saving = loss0 - loss1 - cost
    pays = np.where(np.isfinite(saving), saving > 0, False)
    return NightEconomics(loss0, loss1, cost, saving, pays)


def visit_order(saving, crew_size: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Order blocks by expected saving; mark those the crew can reach.

    Parameters
    ----------
    saving : array_like, shape (n,)
        Expected net saving of protecting each block (NaN where unknown).
    crew_size : int, optional
        How many blocks the crew can start and tend in one night; None for no
        limit.

    Returns
    -------
    order : ndarray of int, shape (n,)
        Block indices, largest saving first; blocks without a figure (NaN)
        last, in their given order (stable).
    reached : ndarray of bool, shape (n,)
        By block index: within the crew's reach, in that order, and with a
        positive saving.
    """
    s = np.asarray(saving, float)
    key = np.where(np.isfinite(s), -s, np.inf)
    order = np.argsort(key, kind="stable")
    rank = np.empty(len(s), dtype=int)
    rank[order] = np.arange(len(s))
    limit = len(s) if crew_size is None else max(int(crew_size), 0)
    reached = (rank < limit) & np.isfinite(s) & (s > 0)
    return order, reached


def _money(x: float) -> str:
    return f"{x:,.0f}"


def economics_sentence(loss_without: float, loss_with: float, running_cost: float,
                       currency: str | None) -> str | None:
    """The one-line verdict, or None when any figure is missing (never a guess).

    Returns
    -------
    str or None
        e.g. ``"expected loss 4,100 without, 600 with, running cost 900 (USD): protecting pays"``.
    """
    vals = (loss_without, loss_with, running_cost)
    if not currency or any(v is None or not math.isfinite(float(v)) for v in vals):
        return None
    pays = loss_without - loss_with > running_cost
    verdict = "protecting pays" if pays else "protecting does not pay"
    return (f"expected loss {_money(loss_without)} without, {_money(loss_with)} with, "
            f"running cost {_money(running_cost)} ({currency}): {verdict}")


def method_protection_c(kind: str, params: Mapping, inversion_c: float | None = None,
                        wind_machine_gain_fraction: float = 0.5) -> float:
    """A method's protection [°C] for the economics, or NaN when unknown.

    The equipment's own ``protection_c`` (farm file) wins; otherwise a wind
    machine recovers ``wind_machine_gain_fraction`` of the measured inversion,
    as the frost plan models it; other methods without the key give NaN (no
    figures, never a guess).
    """
    v = params.get("protection_c")
    if v is not None:
        return float(v)
    if kind == "wind_machine" and inversion_c is not None and math.isfinite(inversion_c):
        return max(float(inversion_c), 0.0) * float(wind_machine_gain_fraction)
    return math.nan
