"""What a recording says about the trigger wheel and the cam, without trusting the rig file.

Used when a new bike is brought up: the tooth count and gap are read from the tooth periods
alone, and the cam level is related to the revolutions the gap marks.

* Gap: a period is a gap when it exceeds ``min_gap_ratio`` times the median of the two periods
  before and the two after it. The periods from one gap to the next are the real teeth of one
  revolution; the gap's period spans ``missing + 1`` tooth pitches, so the ratio of the gap to
  its neighbours, rounded, is ``missing + 1`` (common practice for missing-tooth wheels).
* Cam: the level seen in each revolution (majority over its teeth); a window cam alternates
  from one revolution to the next, and the level of the revolution holding cylinder 1's firing
  TDC is what a rig file's ``cam_active_level`` states.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from crankbeat.errors import InputError

__all__ = ["WheelSeen", "CamSeen", "wheel_from_periods", "edge_levels", "cam_from_revolutions"]


@dataclass(frozen=True)
class WheelSeen:
    """The trigger wheel as the tooth periods show it.

    Attributes
    ----------
    teeth : int
        Tooth positions per revolution, missing ones included.
    missing : int
        Missing teeth in the gap.
    gap_ratio : float
        Median of gap period / median of its four neighbours (about ``missing + 1``).
    revolutions : int
        Gap-to-gap revolutions counted (no lost frame or saturated period inside).
    agreeing : float
        Share of those revolutions with ``teeth - missing`` periods, 0..1.
    """

    teeth: int
    missing: int
    gap_ratio: float
    revolutions: int
    agreeing: float


@dataclass(frozen=True)
class CamSeen:
    """The cam level per revolution.

    Attributes
    ----------
    pattern : {"alternating", "constant", "irregular", "absent"}
        Alternating: a window cam (one level per revolution, changing every revolution).
    level_in_tdc_revolution : int or None
        Level during the revolutions holding cylinder 1's firing TDC; None when that
        revolution is not known or the pattern is not alternating.
    switch_tooth : int or None
        Tooth number (0 = first after the gap) of the first edge showing the new level, the
        most common over the revolutions; None without switches.
    revolutions : int
        Revolutions with a cam level.
    agreeing : float
        Share of revolutions that follow the pattern, 0..1.
    """

    pattern: str
    level_in_tdc_revolution: int | None
    switch_tooth: int | None
    revolutions: int
    agreeing: float


def wheel_from_periods(periods, *, breaks=None, min_gap_ratio: float = 1.4) -> WheelSeen | None:
    """Tooth count and gap of the wheel from consecutive tooth periods.

    Parameters
    ----------
    periods : (n,) array_like
        Consecutive tooth periods, s, oldest first (NaN where saturated).
    breaks : (n,) bool array_like, optional
        True where the sequence is broken just before the period (lost frames): no revolution is
        counted across it.
    min_gap_ratio : float, keyword-only
        Ratio to the neighbours' median above which a period is a gap.

    Returns
    -------
    WheelSeen or None
        None when fewer than two whole revolutions are seen.
    """
    p = np.asarray(periods, dtype=float)
    if p.ndim != 1:
        raise InputError(f"periods must be 1-d, got shape {p.shape}")
    brk = np.zeros(len(p), bool) if breaks is None else np.asarray(breaks, bool)
    if brk.shape != p.shape:
        raise InputError(f"breaks must have shape {p.shape}, got {brk.shape}")
    if not min_gap_ratio > 1:
        raise InputError(f"min_gap_ratio must be > 1, got {min_gap_ratio!r}")
    if len(p) < 5:
        return None
    nb = np.column_stack([np.roll(p, k) for k in (-2, -1, 1, 2)])
    nb[:2] = np.nan
    nb[-2:] = np.nan
    ref = np.median(nb, axis=1)
    ratio = p / ref
    gaps = np.flatnonzero(ratio > min_gap_ratio)
    if len(gaps) < 3:
        return None
    bad = np.cumsum(brk | ~np.isfinite(p))  # broken or saturated periods so far
    clean = bad[gaps[1:]] - bad[gaps[:-1]] == 0
    counts = np.diff(gaps)[clean]
    if len(counts) < 2:
        return None
    values, n = np.unique(counts, return_counts=True)
    real = int(values[np.argmax(n)])
    gap_ratio = float(np.median(ratio[gaps]))
    missing = max(int(round(gap_ratio)) - 1, 1)
    return WheelSeen(teeth=real + missing, missing=missing, gap_ratio=gap_ratio,
                     revolutions=len(counts), agreeing=float(np.max(n) / len(counts)))


def edge_levels(edge_t, frame_time, frame_level) -> np.ndarray:
    """The level each tooth edge's frame carried (the frame that brought the edge).

    Parameters
    ----------
    edge_t : (n,) array_like
        Edge times, s (at or before the receive time of their frame).
    frame_time : (m,) array_like
        Receive times of the frames, s, non-decreasing.
    frame_level : (m,) array_like
        A per-frame value (the cam level, -1 when none).

    Returns
    -------
    (n,) int8
    """
    ft = np.asarray(frame_time, dtype=float)
    lv = np.asarray(frame_level).astype(np.int8)
    if ft.shape != lv.shape:
        raise InputError(f"frame_time and frame_level differ in shape: {ft.shape}, {lv.shape}")
    if len(ft) == 0:
        return np.full(np.shape(edge_t), -1, np.int8)
    i = np.searchsorted(ft, np.asarray(edge_t, dtype=float), side="left")
    return lv[np.clip(i, 0, len(ft) - 1)]


def cam_from_revolutions(revolution, tooth, level, holds_tdc=None) -> CamSeen:
    """Cam level per revolution and how it relates to cylinder 1's firing TDC.

    Parameters
    ----------
    revolution : (n,) int array_like
        Revolution number of each edge (counted from tooth 0; -1 where not synced).
    tooth : (n,) int array_like
        Tooth number of each edge, 0 = first after the gap.
    level : (n,) int array_like
        Cam level at each edge (0/1; -1 when the rig carries no cam).
    holds_tdc : (n,) bool array_like, optional
        Whether the edge's revolution holds cylinder 1's firing TDC, from a source other than
        the cam (the firing pattern); None when unknown.
    """
    rev = np.asarray(revolution, dtype=np.int64)
    th = np.asarray(tooth, dtype=np.int64)
    lv = np.asarray(level, dtype=np.int64)
    ok = (rev >= 0) & (lv >= 0)
    if not ok.any():
        return CamSeen("absent", None, None, 0, 0.0)
    r_ids, inv = np.unique(rev[ok], return_inverse=True)
    ones = np.bincount(inv, weights=lv[ok]) / np.bincount(inv)
    rev_level = (ones >= 0.5).astype(int)
    consecutive = np.diff(r_ids) == 1
    if len(r_ids) < 2 or not consecutive.any():
        return CamSeen("irregular", None, None, len(r_ids), 0.0)
    changes = (np.diff(rev_level) != 0)[consecutive]
    share_alt = float(changes.mean())
    if share_alt >= 0.9:
        pattern, agreeing = "alternating", share_alt
    elif share_alt <= 0.1:
        pattern, agreeing = "constant", 1.0 - share_alt
    else:
        pattern, agreeing = "irregular", max(share_alt, 1.0 - share_alt)
    switch = None
    idx = np.flatnonzero(ok)  # consecutive edges that carry a level
    d = idx[1:][np.diff(lv[idx]) != 0]
    if len(d):
        vals, n = np.unique(th[d], return_counts=True)
        switch = int(vals[np.argmax(n)])
    level_tdc = None
    if pattern == "alternating" and holds_tdc is not None:
        h = np.asarray(holds_tdc, bool)[ok]
        tdc_rev = np.bincount(inv, weights=h.astype(float)) / np.bincount(inv) >= 0.5
        if tdc_rev.any():
            level_tdc = int(np.round(np.mean(rev_level[tdc_rev])))
    return CamSeen(pattern, level_tdc, switch, len(r_ids), agreeing)
