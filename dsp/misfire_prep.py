"""Vectorised preparations of the misfire decision: levels of the neighbouring events, fuel cut.

Pure functions over the detector's event buffer (window work per event, NaN where unusable).
"""

from __future__ import annotations

import warnings

import numpy as np


def _gather(values: np.ndarray, idx: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    j = idx[:, None] + offsets[None, :]
    inb = (j >= 0) & (j < values.size)
    return np.where(inb, values[np.clip(j, 0, values.size - 1)], np.nan)


def other_cylinders_level(metric: np.ndarray, i0: int, i1: int, n_cyl: int) -> np.ndarray:
    """Median metric of the other cylinders' events within ``n_cyl - 1`` events either side.

    Parameters
    ----------
    metric : (m,) float
        The decision's metric of the buffered events (NaN unusable).
    i0, i1 : int
        Events ``i0..i1-1`` of the buffer are wanted.
    n_cyl : int

    Returns
    -------
    others : (i1-i0,) float
        0 for a single cylinder; NaN when none is usable.
    """
    idx = np.arange(i0, i1)
    if n_cyl < 2:
        return np.zeros(idx.size)
    offs = np.concatenate((np.arange(-(n_cyl - 1), 0), np.arange(1, n_cyl)))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN rows give NaN, as meant
        return np.nanmedian(_gather(metric, idx, offs), axis=1)


def typical_work(work: np.ndarray, i0: int, i1: int, n_cyl: int) -> np.ndarray:
    """The engine's typical work around each event, for the relative contribution.

    Parameters
    ----------
    work : (m,) float
        Window work of the buffered events, J (NaN unusable).
    i0, i1 : int
        Events ``i0..i1-1`` of the buffer are wanted.
    n_cyl : int

    Returns
    -------
    base : (i1-i0,) float
        Mean of the upper half of the ``2·n_cyl`` events either side (a neighbouring misfire does
        not pull it down), J; NaN with fewer than ``2·n_cyl`` usable neighbours.
    """
    idx = np.arange(i0, i1)
    nn = 2 * n_cyl
    nb = _gather(work, idx, np.concatenate((np.arange(-nn, 0), np.arange(1, nn + 1))))
    srt = np.sort(np.where(np.isfinite(nb), nb, -np.inf), axis=1)[:, ::-1]
    cnt = np.isfinite(nb).sum(axis=1)
    half = np.maximum(cnt // 2, 1)
    take = np.arange(2 * nn)[None, :] < half[:, None]
    base = np.where(take & np.isfinite(srt), srt, 0.0).sum(axis=1) / half
    return np.where(cnt >= max(2, nn), base, np.nan)


def fuel_cut_flags(ev, work, throttle, i0, i1, n_cyl, swept_m3, s, last_closed_t):
    """Which events are the ECU's overrun fuel cut.

    Parameters
    ----------
    ev : raw events ``i0..i1-1`` (:data:`dsp.fluctuation.RAW_EVENT_DTYPE`)
    work, throttle : (m,) float
        Window work (J, NaN unusable) and throttle (%, NaN unknown) of the whole buffer.
    i0, i1 : int
    n_cyl : int
    swept_m3 : float
        Swept volume of one cylinder, m³ (work / volume = mean pressure).
    s : MisfireSettings
    last_closed_t : float
        Time the throttle was last seen closed before event ``i0``, s.

    Returns
    -------
    sure : (i1-i0,) bool
        Fuel cut whatever the event's own score: throttle closed and no cylinder around fires
        (with the throttle unknown: nor this one), or throttle closed and this event has no work.
    maybe : (i1-i0,) bool
        Fuel cut if the event has no combustion by its score: the throttle was closed within
        ``fuel_cut_hold_s`` or two cycles (the ECU cuts and restores fuel around a closed
        throttle faster than a 100 Hz status signal shows).
    last_closed_t : float
        Updated for the next call.
    """
    idx = np.arange(i0, i1)
    tp = throttle[i0:i1]
    closed = ~(tp > s.closed_throttle_pct)
    thr_nb = _gather(throttle, idx, np.arange(-2 * n_cyl, 2 * n_cyl + 1))
    closed_near = closed | (thr_nb <= s.closed_throttle_pct).any(axis=1)
    seen_closed = np.where(tp <= s.closed_throttle_pct, ev["t"], -np.inf)
    t_closed = np.maximum.accumulate(np.concatenate(([last_closed_t], seen_closed)))
    closed_near |= ev["t"] - t_closed[1:] <= s.fuel_cut_hold_s
    reach = max(n_cyl - 1, 1)  # a single cylinder: its own cycles before and after
    around = _gather(work, idx, np.arange(-reach, reach + 1))
    n_around = np.isfinite(around).sum(axis=1)
    around_mean = np.where(np.isfinite(around), around, 0.0).sum(axis=1) / np.maximum(n_around, 1)
    around_mean = np.where(n_around > 0, around_mean, np.nan)
    bar = 1.0 / swept_m3 / 1e5
    none_fire = around_mean * bar < s.fuel_cut_work_bar
    no_fire = none_fire | (work[i0:i1] * bar < s.fuel_cut_work_bar)
    known_closed = tp <= s.closed_throttle_pct
    fast = (ev["rpm"] >= s.fuel_cut_min_rpm) & np.isfinite(around_mean)
    # with no throttle signal, only an event that itself has no work next to others without it
    # (a per-cylinder bias can pull the mean of a few events down while they fire)
    own_none = work[i0:i1] * bar < s.fuel_cut_work_bar
    sure = ((closed & none_fire & (own_none | known_closed)) | (known_closed & no_fire)
            | (closed_near & no_fire & ~np.isnan(tp))) & fast
    maybe = closed_near & ~np.isnan(tp) & fast
    return sure, maybe, float(t_closed[-1])
