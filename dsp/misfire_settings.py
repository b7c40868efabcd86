"""Options of the misfire decision (:mod:`dsp.misfire`); the rig file may set the threshold."""

from __future__ import annotations

from dataclasses import dataclass

from crankbeat.errors import InputError


@dataclass(frozen=True)
class MisfireSettings:
    """Options of the misfire decision (the rig file may override the threshold).

    Attributes
    ----------
    threshold : float or None
        A fixed threshold on the metric (robust sigma); None = ``z_threshold``.
    feature : str
        Raw-event field judged: ``step`` (the energy step across TDC, no inertia model),
        ``work`` (the window's work with the loss balance) or ``swing`` (the window's energy
        change minus the speed trend, without the balance).
    z_threshold : float
        Robust standard deviations below the cylinder's own baseline for a misfire.
    cross_threshold : float
        Robust standard deviations a misfire must also lie below the other cylinders' level.
    history_cycles, lookahead_cycles : int
        Cycles of the cylinder's accepted history and of look-ahead in its baseline.
    spread_events : int
        Deviations per cylinder behind its robust spread.
    spread_floor : float
        Smallest spread, as a share of the work level around the event.
    warmup_cycles : int
        Accepted deviations a cylinder needs before its events are decided.
    dead_ratio : float
        A cylinder whose recent level is below this share of the other cylinders' is dead.
    partial_depth : float
        A flagged event with a depth below this, on a scale from the cylinder's own motored level
        (a fuel cut in the same rpm cell), is a partial burn.
    partial_gap : float
        ... and when its missing work falls short of a whole misfire's by this many robust sigma.
    own_scale_spread, own_partial_gap, own_rpm_share : float
        Where the cylinder's own misfires in the rpm cell within ``own_rpm_share`` of the
        event's speed agree within ``own_scale_spread``
        (robust spread over their median), a flagged event missing less than ``partial_depth``
        of their median, and short of it by ``own_partial_gap`` robust sigma of the events, is a
        partial burn too (the misfires' agreement already puts their median 2 of their own
        spreads above such an event, so a smaller gap than ``partial_gap`` serves). A fuel cut
        at closed throttle is a poor measure of a misfire at load: on the simulated Larch at
        3500 rpm, 20 % throttle, misfires take away 1.5-1.9 times what the motored scale says,
        a 45 % burn 0.7-1.1 of it (0.4-0.6 of the misfires' median).
    depth_min_count, depth_history : int
        Fuel-cut events or misfires per cell needed for a depth scale; values kept per cell.
    pattern_events : int
        Candidate flags per cylinder behind the self-check.
    dead_run : int
        Misfires in a row on one cylinder that start a dead spell (see ``_dead``).
    dead_share_drop : float
        ... when the cylinder's share of the engine's work fell by this much against its share
        before the run.
    dead_start_share : float
        A cylinder dead from the ride's start also has a share of the engine's work below this.
    dead_scatter : float
        A cylinder dead from the ride's start scatters less than this share of the others'
        robust spread (it lacks their cycle-to-cycle combustion scatter).
    local_scatter : float
        When the recent fired events of all cylinders scatter more than this many times their
        usual robust spread (a rough road), the threshold rises in proportion.
    gap_margin : float
        Within two cycles of an event without a metric (lost frames), the threshold is this much
        higher.
    ring_share : float
        Within two cycles after a misfire, another cylinder's misfire must also score above
        this share of that misfire's score (the driveline rings after a misfire).
    closed_throttle_pct, fuel_cut_min_rpm, fuel_cut_work_bar : float
        Fuel-cut recognition: throttle at or below, rpm at or above, and mean window work of the
        events around below this (bar of swept volume).
    fuel_cut_hold_s : float
        For this long after the throttle was last seen closed, an event without combustion is
        still the ECU's cut (gear changes, cut exit).
    """

    threshold: float | None = None
    feature: str = "step"
    z_threshold: float = 5.0
    cross_threshold: float = 3.0
    history_cycles: int = 8
    lookahead_cycles: int = 2
    spread_events: int = 48
    spread_floor: float = 0.005
    warmup_cycles: int = 8
    dead_ratio: float = 0.3
    partial_depth: float = 0.7
    partial_gap: float = 6.0
    own_scale_spread: float = 0.15
    own_rpm_share: float = 0.05
    own_partial_gap: float = 3.0
    depth_min_count: int = 4
    depth_history: int = 16
    pattern_events: int = 32
    ring_share: float = 0.4
    local_scatter: float = 1.5
    gap_margin: float = 1.3
    dead_run: int = 6
    dead_share_drop: float = 0.3
    dead_scatter: float = 0.75
    dead_start_share: float = 0.5
    closed_throttle_pct: float = 2.0
    fuel_cut_min_rpm: float = 1600.0
    fuel_cut_work_bar: float = 1.0
    fuel_cut_hold_s: float = 0.15

    def __post_init__(self) -> None:
        if self.threshold is not None and not self.threshold > 0:
            raise InputError(
                f"misfire threshold must be > 0 (robust sigma), got {self.threshold!r}"
            )
        if self.feature not in ("step", "work", "swing"):
            raise InputError(
                f"feature must be 'step', 'work' or 'swing', got {self.feature!r}")
        if not self.z_threshold > 0 or not self.cross_threshold >= 0:
            raise InputError(
                "need z_threshold > 0 and cross_threshold >= 0, got "
                f"{self.z_threshold!r}, {self.cross_threshold!r}"
            )
        for name in ("history_cycles", "lookahead_cycles", "spread_events", "warmup_cycles",
                     "depth_min_count", "depth_history", "pattern_events"):
            if int(getattr(self, name)) < 1:
                raise InputError(f"{name} must be >= 1, got {getattr(self, name)!r}")
        for name in ("own_scale_spread", "own_partial_gap", "own_rpm_share"):
            if not getattr(self, name) > 0:
                raise InputError(f"{name} must be > 0, got {getattr(self, name)!r}")
        if not 0 < self.dead_ratio < 1 or not 0 < self.partial_depth < 1:
            raise InputError(
                f"dead_ratio and partial_depth must be in (0, 1), got {self.dead_ratio!r}, "
                f"{self.partial_depth!r}"
            )
