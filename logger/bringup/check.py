"""Check a rig file against a short recording of the bike it describes.

Reads the recording (python-can's log readers via :func:`logger.stream.replay`, plus one pass
over the raw frames for the id census), hands the arrays to :mod:`dsp.wheelprobe` and
:mod:`dsp.tdcfit`, and returns a :class:`RigCheck`: what was seen, and the rig-file values it
suggests where they differ from the file.
"""

from __future__ import annotations

import os
import warnings
from dataclasses import dataclass, field, replace

import numpy as np

from crankbeat.dsp.crank import ToothWheel, phase_distinguishable, reconstruct_crank
from crankbeat.dsp.tdcfit import TdcEstimate, tdc_from_motoring
from crankbeat.dsp.wheelprobe import (
    CamSeen,
    WheelSeen,
    cam_from_revolutions,
    edge_levels,
    wheel_from_periods,
)
from crankbeat.logger.can.sources import open_log
from crankbeat.logger.rig.model import Rig
from crankbeat.logger.stream import replay

__all__ = ["IdRate", "RigCheck", "check_rig", "CLOSED_THROTTLE_PCT"]

#: throttle at or below this is closed, %; above OVERRUN_IDLE_FACTOR x idle the ECU cuts fuel
#: on overrun (common practice), so nothing fires
CLOSED_THROTTLE_PCT = 1.0
OVERRUN_IDLE_FACTOR = 1.5
#: the first part of each closed-throttle stretch is left out (an ECU cuts fuel after a delay)
FUEL_CUT_SETTLE_S = 0.3
#: a TDC estimate this far (and two standard errors) from the file's value becomes a suggestion
SUGGEST_TDC_DEG = 1.0
#: a cylinder whose own dips sit this far from cylinder 1's is not where the layout puts it:
#: healthy cylinders of simulated roll-offs differ by up to 1.3 deg (heat loss, partner
#: pumping); a wrong layout moves a TDC by tens of degrees, so the fit lands anywhere
DIP_DISAGREE_DEG = 3.0


@dataclass(frozen=True)
class IdRate:
    can_id: int
    extended: bool
    frames: int
    rate_hz: float
    name: str | None  # the rig's message name; None for an id the rig does not describe
    expected_hz: float | None = None


@dataclass
class RigCheck:
    rig: Rig
    duration_s: float
    ids: list[IdRate]
    unknown_ids: list[IdRate]
    wheel: WheelSeen | None
    cam: CamSeen | None
    cam_note: str
    tdc: TdcEstimate | None
    tdc_note: str
    sensors: dict[str, tuple[int, float]] = field(default_factory=dict)  # samples, rate Hz
    teeth_per_frame: int = 1  # a cam change shows at the end of a frame: up to this - 1 late
    tdc_stretch: str = ""  # "in neutral", "in gear" or "gear not logged": what the TDC came from
    misplaced_dips: tuple[int, ...] = ()  # cylinders (1-based) whose dips the layout misplaces
    suggestions: dict[str, object] = field(default_factory=dict)


def _census(can_path, rig: Rig) -> tuple[float, list[IdRate], list[IdRate]]:
    ids, ext, ts = [], [], []
    source = open_log(can_path)
    try:
        for b in source.batches(65536):
            ok = ~b.is_error & ~b.is_remote
            ids.append(b.can_id[ok])
            ext.append(b.extended[ok])
            ts.append(b.ts[ok])
    finally:
        source.close()
    cid = np.concatenate(ids) if ids else np.zeros(0, np.uint32)
    ex = np.concatenate(ext) if ext else np.zeros(0, bool)
    t = np.concatenate(ts) if ts else np.zeros(0)
    dur = float(t.max() - t.min()) if len(t) > 1 else 0.0
    key = cid.astype(np.uint64) | (ex.astype(np.uint64) << np.uint64(32))
    keys, counts = np.unique(key, return_counts=True)
    seen = {int(k): int(n) for k, n in zip(keys, counts)}

    def rate(n: int) -> float:
        return n / dur if dur > 0 else 0.0

    known = []
    for m in rig.messages:
        n = seen.pop(int(m.can_id) | (int(m.extended) << 32), 0)
        known.append(IdRate(m.can_id, m.extended, n, rate(n), m.name, m.rate_hz))
    unknown = [IdRate(k & 0xFFFFFFFF, bool(k >> 32), n, rate(n), None)
               for k, n in sorted(seen.items(), key=lambda kv: -kv[1])]
    return dur, known, unknown


def _read(rig: Rig, can_path, accel):
    teeth, status, acc = [], [], {}
    with replay(rig, can_path, accel, chunk_s=2.0) as stream:
        for chunk in stream:
            teeth.append(chunk.teeth)
            status.append(chunk.status)
            for name, block in chunk.accel.items():
                acc.setdefault(name, []).append(block.t)

    def cat(parts, k):
        return np.concatenate([getattr(p, k) for p in parts])

    tb = {k: cat(teeth, k) for k in ("frame_time", "periods", "cam", "lost_before")}
    st_t = cat(status, "t")
    roles = {r: np.concatenate([s.values[r] for s in status]) for r in status[0].values} \
        if status else {}
    sensors = {}
    for name, parts in acc.items():
        t = np.concatenate(parts)
        sensors[name] = (len(t), (len(t) - 1) / (t[-1] - t[0]) if len(t) > 1 else 0.0)
    return tb, st_t, roles, sensors


def _no_firing_mask(rig: Rig, edge_t, st_t, roles) -> tuple[np.ndarray | None, str]:
    if "throttle" not in roles or "engine_speed" not in roles:
        return None, "TDC not estimated: the rig has no throttle and engine-speed signals"
    closed = (roles["throttle"] <= CLOSED_THROTTLE_PCT) & \
        (roles["engine_speed"] > OVERRUN_IDLE_FACTOR * rig.limits.idle_rpm)
    # time since the throttle closed, per status frame
    start = np.where(closed & ~np.concatenate(([False], closed[:-1])), st_t, np.nan)
    since = st_t - np.fmax.accumulate(np.nan_to_num(start, nan=-np.inf))
    ok = closed & (since >= FUEL_CUT_SETTLE_S)
    i = np.clip(np.searchsorted(st_t, edge_t, side="right") - 1, 0, max(len(st_t) - 1, 0))
    mask = ok[i] if len(st_t) else np.zeros(len(edge_t), bool)
    if not mask.any():
        return None, "TDC not estimated: no stretch without firing (closed throttle above " \
            f"{OVERRUN_IDLE_FACTOR:g} x idle)"
    return mask, ""


def check_rig(rig: Rig, can_path: str | os.PathLike, accel: dict | None = None, *,
              window_deg: float = 40.0, search_deg: float = 20.0) -> RigCheck:
    """Compare a rig with a short recording of the bike; see :class:`RigCheck`."""
    dur, known, unknown = _census(can_path, rig)
    tb, st_t, roles, sensors = _read(rig, can_path, accel)
    per = tb["periods"]
    breaks = np.zeros(per.shape, bool)
    if per.size:
        breaks[:, 0] = tb["lost_before"] > 0
    seen = wheel_from_periods(per.reshape(-1), breaks=breaks.reshape(-1))
    out = RigCheck(rig, dur, known, unknown, seen, None, "", None, "", sensors,
                   teeth_per_frame=per.shape[1] if per.ndim == 2 else 1)
    if seen is None:
        out.cam_note = "not checked: no tooth wheel seen in the log"
        out.tdc_note = "TDC not estimated: no tooth wheel seen in the log"
        return out
    w = rig.wheel
    wheel = ToothWheel(seen.teeth, seen.missing, w.tdc_offset_deg, w.cam, w.cam_active_level)
    if (seen.teeth, seen.missing) != (w.teeth, w.missing):
        out.suggestions.update({"wheel.teeth": seen.teeth, "wheel.missing": seen.missing})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # a phase left unknown is reported below instead
        _check_cam(out, rig, wheel, tb)
        angles = reconstruct_crank(tb["frame_time"], per, tb["cam"], tb["lost_before"], wheel,
                                   rig.engine)
    mask, out.tdc_note = _no_firing_mask(rig, angles.t, st_t, roles)
    if mask is not None:
        _estimate_tdc(out, rig, wheel, angles, mask, _in_neutral(angles.t, st_t, roles),
                      window_deg, search_deg)
    return out


def _in_neutral(edge_t, st_t, roles) -> np.ndarray | None:
    """Per edge: the gearbox in neutral (gear 0) at the last status frame; None without gear."""
    if "gear" not in roles or not len(st_t):
        return None
    i = np.clip(np.searchsorted(st_t, edge_t, side="right") - 1, 0, len(st_t) - 1)
    return np.asarray(roles["gear"])[i] == 0


def _estimate_tdc(out: RigCheck, rig: Rig, wheel: ToothWheel, angles, mask, neutral,
                  window_deg: float, search_deg: float) -> None:
    """TDC from the stretch without firing, from its part in neutral when that is long enough.

    In gear the driveline's damping tilts the dip (about -1 deg, dsp/tdcfit.py); in neutral the
    crank turns free of it.
    """
    est = None
    out.tdc_stretch = "gear not logged"
    if neutral is not None and (mask & neutral).any():
        used = mask & neutral
        est = tdc_from_motoring(angles, used, wheel, rig.engine,
                                window_deg=window_deg, search_deg=search_deg)
        out.tdc_stretch = "in neutral"
    if est is None:
        used = mask
        est = tdc_from_motoring(angles, mask, wheel, rig.engine, window_deg=window_deg,
                                search_deg=search_deg)
        out.tdc_stretch = "in gear" if neutral is not None else out.tdc_stretch
    if est is None:
        out.tdc_note = "TDC not estimated: the stretch without firing is too short " \
            "(fewer than 20 whole cycles)"
        return
    if est.at_search_edge:
        out.tdc_note = f"TDC not estimated: no symmetry point within ±{search_deg:g} deg " \
            "of the file's value"
        return
    out.tdc = est
    cautions = []
    fit = {"window_deg": window_deg, "search_deg": search_deg}
    out.misplaced_dips, first = _misplaced_dips(rig, wheel, angles, used, fit)
    if out.misplaced_dips:  # pooling with a misplaced cylinder would pull cylinder 1's value
        out.tdc = est = first
        cautions.append(_misplaced_note(rig, out.misplaced_dips))
    if out.tdc_stretch == "in gear":
        cautions.append("taken in gear: the driveline tilts the dip (about -1 deg); a roll-off "
                        "in neutral is better")
    if est.partner_exchange:
        cautions.append("another cylinder passes its gas-exchange TDC at a firing TDC: its "
                        "one-sided pumping leans the dip early (about -1 deg)")
    out.tdc_note = "; ".join(cautions)
    value = float(np.mod(rig.wheel.tdc_offset_deg + est.correction_deg, 360.0))
    # within 1 deg the method's own leanings (dsp/tdcfit.py) are as large as the difference
    limit = SUGGEST_TDC_DEG + (1.0 if cautions else 0.0)
    if abs(est.correction_deg) > max(2 * est.se_deg, limit) and not out.misplaced_dips:
        out.suggestions["wheel.tdc_offset_deg"] = round(value, 1)


def _misplaced_dips(rig: Rig, wheel: ToothWheel, angles, mask, fit: dict
                    ) -> tuple[tuple[int, ...], TdcEstimate | None]:
    """Cylinders whose own compression dips do not sit with cylinder 1's (1-based numbers),
    and cylinder 1's own estimate.

    Each cylinder is fitted alone; one whose dips are missing from its windows (no symmetry
    point, or one at the search edge) or lie more than :data:`DIP_DISAGREE_DEG` from cylinder
    1's is where the rig's layout does not put it.
    """
    n = rig.engine.n_cylinders
    if n < 2:
        return (), None
    own = [tdc_from_motoring(angles, mask, wheel, rig.engine, cylinders=[k], **fit)
           for k in range(n)]
    first = own[0]
    if first is None or first.at_search_edge:
        return (), None  # cylinder 1 is the reference; the pooled fit said what it could
    return tuple(k + 1 for k, e in enumerate(own[1:], start=1)
                 if e is None or e.at_search_edge
                 or abs(e.correction_deg - first.correction_deg) > DIP_DISAGREE_DEG), first


def _misplaced_note(rig: Rig, cylinders: tuple[int, ...]) -> str:
    which = ", ".join(map(str, cylinders))
    return (f"the compression dips of cylinder{'s' if len(cylinders) > 1 else ''} {which} are "
            f"not where the layout ({rig.engine.name}) puts them: check the layout "
            "(crankbeat checks it on a ride too) before the TDC; the TDC shown is cylinder "
            "1's own, and none is suggested")


def _check_cam(out: RigCheck, rig: Rig, wheel: ToothWheel, tb) -> None:
    """Cam level per revolution, against the revolution the firing pattern says holds TDC."""
    if rig.message_for("cam_level") is None:
        out.cam_note = "no cam signal in the rig"
        return
    blind = replace(wheel, cam="none")
    angles = reconstruct_crank(tb["frame_time"], tb["periods"], tb["cam"], tb["lost_before"],
                               blind, rig.engine, phase="pattern")
    ok = angles.tooth >= 0
    rev_start = angles.angle - angles.tooth * wheel.pitch_deg  # angle of tooth 0's edge
    rev = np.where(ok, np.floor((rev_start + wheel.tdc_offset_deg) / 360.0 + 0.5), -1)
    # a frame's cam bit is the level at its last tooth: only those edges carry it
    frame = np.searchsorted(tb["frame_time"], angles.t, side="left")
    last = np.append(frame[1:] != frame[:-1], True)
    level = np.where(last, edge_levels(angles.t, tb["frame_time"], tb["cam"]), -1)
    phase_known = phase_distinguishable(rig.engine) and bool(np.any(angles.valid))
    holds = np.mod(-rev_start, 720.0) < 360.0 if phase_known else None
    if holds is not None:
        holds = np.where(angles.valid, holds, False)
    cam = cam_from_revolutions(rev.astype(np.int64), angles.tooth, level, holds)
    out.cam = cam
    if cam.pattern != "alternating":
        out.cam_note = f"cam level {cam.pattern} from revolution to revolution"
        if rig.wheel.cam == "window":
            out.suggestions["wheel.cam"] = "none"
    elif cam.level_in_tdc_revolution is None:
        out.cam_note = "the crank speed cannot tell which revolution holds cylinder 1's " \
            "firing TDC (even-firing layout or no firing seen): the file's level is kept"
    else:
        out.cam_note = f"level {cam.level_in_tdc_revolution} in the revolution holding " \
            "cylinder 1's firing TDC (from the firing pattern)"
        if rig.wheel.cam != "window" or cam.level_in_tdc_revolution != rig.wheel.cam_active_level:
            out.suggestions["wheel.cam"] = "window"
            out.suggestions["wheel.cam_active_level"] = cam.level_in_tdc_revolution
