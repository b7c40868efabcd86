"""The roadside screen: big engine speed, one row per cylinder, the checks and stream health.

The pipeline builds a :class:`LiveState` (plain data, no rich types) a few times a second and
calls :meth:`LiveDisplay.update`. :meth:`LiveDisplay.render` returns the rich renderable, so a
test can print it into a recording console and read the text.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from rich import box
from rich.console import Console, Group, RenderableType
from rich.live import Live
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

#: Shown before every live ride, on the terminal and at the top of the display.
CAUTION_LINES = (  # each fits an 80-column terminal with its "CAUTION: " prefix
    "Ride only on a closed course, or on roads where this testing is legal.",
    "Never operate the laptop while riding: read this screen when stopped.",
    "Secure the laptop, sensors and cables clear of controls, chain, heat.",
    "Misfire can overheat the catalyst and start a fire: on alert, stop.",
    "Follow local rules and your organisation's qualified test practice.",
)


#: Kept at the foot of the live screen at all times (the full cautions scroll away).
CAUTION_FOOTER = "read only when stopped · on an alert stop safely · local rules apply"

#: Added under a misfire alert: what to do, without overriding local rules or test practice.
STOP_ADVICE = "Stop safely when the road allows (local rules, qualified test practice)."


def caution_text() -> str:
    return "\n".join(f"CAUTION: {line}" for line in CAUTION_LINES)


@dataclass
class CylinderState:
    """Counts of one cylinder since the start of the ride, and its latest 200-rev window."""

    cylinder: int
    events: int = 0
    misfires: int = 0
    rate200_pct: float | None = None  # misfire rate of the latest 200-revolution window, %
    contribution: float | None = None
    partial: int = 0  # partial burns: counted events, no misfires


@dataclass
class IntervalState:
    """A firing interval: expected by the layout and observed (mean over the recent events)."""

    from_cyl: int
    to_cyl: int
    expected_deg: float
    observed_deg: float | None = None


@dataclass
class LiveState:
    """Everything the live display shows. Plain values; None where not known yet."""

    elapsed_s: float = 0.0
    rpm: float | None = None
    throttle_pct: float | None = None
    cylinders: list[CylinderState] = field(default_factory=list)
    intervals: list[IntervalState] = field(default_factory=list)
    interval_tolerance_deg: float = 3.0
    vibration: dict[str, float] = field(default_factory=dict)  # sensor -> weighted rms, m/s²
    can_frames: int = 0
    can_lost: int = 0
    serial_crc_errors: int = 0
    serial_reconnects: int = 0
    synced: bool = True
    recording: str | None = None  # folder being recorded into
    notes: list[str] = field(default_factory=list)
    # intervals are judged only once the wheel's tooth spacing errors are corrected (a stored
    # correction, or one learnt on the ride's first fuel cut): before, they show the wheel
    wheel_learnt: bool = True
    vibration_weighting: dict[str, str] = field(default_factory=dict)  # sensor -> "Wh", "none"
    faults: list[str] = field(default_factory=list)  # live faults: silent bus, store, recording


# Our own palette: amber for attention, deep red for the alert, teal for good.
_OK, _WARN, _ALERT, _DIM = "bold #2bb3a3", "bold #e8a33d", "bold white on #9b1c1c", "#7f8a93"


class LiveDisplay:
    """The live screen.

    Parameters
    ----------
    console : rich Console, optional
        Where to draw (default: a new Console on stdout).
    alert_pct : float
        Misfire-rate alert level, % (the rig's ``limits.misfire_alert_pct``).
    live : bool
        True redraws in place (rich Live, for a terminal); False prints updates one below the
        other (for logs and tests).
    plain_every_s : float
        Without ``live``, print at most one update per this many seconds of ride time (and at
        once when the alerts change), so that a log stays readable.
    """

    def __init__(self, console: Console | None = None, *, alert_pct: float = 2.0,
                 live: bool = True, plain_every_s: float = 5.0) -> None:
        self.console = console or Console()
        self.alert_pct = float(alert_pct)
        self._live_mode = live
        self._live: Live | None = None
        self._plain_every_s = float(plain_every_s)
        self._last_plain: tuple[float, list[str]] | None = None

    def __enter__(self) -> LiveDisplay:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def start(self) -> None:
        self.console.print(Text(caution_text(), style=_WARN))
        if self._live_mode and self._live is None:
            self._live = Live(console=self.console, refresh_per_second=4, transient=False)
            self._live.start()

    def stop(self) -> None:
        if self._live is not None:
            self._live.stop()
            self._live = None

    def update(self, state: LiveState) -> None:
        if self._live is not None:
            self._live.update(self.render(state))
            return
        alerts = self.alerts(state) + list(state.faults)
        if self._last_plain is not None:
            last_t, last_alerts = self._last_plain
            if alerts == last_alerts and state.elapsed_s - last_t < self._plain_every_s:
                return
        self._last_plain = (state.elapsed_s, alerts)
        self.console.print(self.render(state))

    def alerts(self, state: LiveState) -> list[str]:
        """One line per reason to stop: misfire over the limit, no crank sync."""
        out = []
        over = [f"cyl {c.cylinder}: {c.rate200_pct:.1f} %" for c in state.cylinders
                if c.rate200_pct is not None and c.rate200_pct > self.alert_pct]
        if over:  # one line for all cylinders: the screen must hold a four's alerts
            out.append(f"MISFIRE ALERT {', '.join(over)} over 200 revs "
                       f"(limit {self.alert_pct:g} %)")
            out.append(STOP_ADVICE)
        if not state.synced:
            out.append("NO CRANK SYNC: events are not being judged")
        return out

    def notices(self, state: LiveState) -> list[str]:
        """Firing intervals off the layout: worth a look when stopped, not a reason to stop.
        None before the wheel is learnt (then the intervals show the wheel's own errors)."""
        if not state.wheel_learnt:
            return []
        return [f"INTERVAL {i.from_cyl}>{i.to_cyl} {i.observed_deg:.1f} deg, expected "
                f"{i.expected_deg:.0f} +- {state.interval_tolerance_deg:g}"
                for i in state.intervals
                if i.observed_deg is not None and abs(i.observed_deg - i.expected_deg) >
                state.interval_tolerance_deg]

    def render(self, state: LiveState) -> RenderableType:
        """The screen; it fits an 80 x 24 terminal (a four-cylinder rig with two notes)."""
        parts: list[RenderableType] = [self._headline(state)]
        alerts = self.alerts(state)
        if alerts:
            parts.append(Text("\n".join(alerts), style=_ALERT))
        notices = self.notices(state)
        if len(notices) > 2:  # a four's whole pattern off: one line, the table has the figures
            notices = [f"INTERVALS OFF: {len(notices)} of {len(state.intervals)} beyond "
                       f"+- {state.interval_tolerance_deg:g} deg (table below)"]
        if notices:
            parts.append(Text("\n".join(notices), style=_WARN))
        # Cylinders and intervals side by side: the whole screen fits a small laptop window.
        row = Table.grid(padding=(0, 2))
        if state.intervals:
            row.add_row(self._cylinders(state), self._intervals(state))
        else:
            row.add_row(self._cylinders(state))
        parts.append(row)
        parts.append(self._health(state))
        for fault in state.faults:
            parts.append(Text(fault, style=_WARN, no_wrap=True, overflow="ellipsis"))
        for note in state.notes[-2:]:
            parts.append(Text(f"note: {note}", style=_DIM, no_wrap=True, overflow="ellipsis"))
        return Panel(Group(*parts), title="crankbeat ride", border_style="#2bb3a3",
                     subtitle=Text(CAUTION_FOOTER, style=_WARN), padding=(0, 1))

    def _headline(self, s: LiveState) -> Text:
        rpm = "----" if s.rpm is None or not math.isfinite(s.rpm) else f"{s.rpm:5.0f}"
        t = Text()
        t.append(f"{rpm} rpm", style="bold white")
        if s.throttle_pct is not None and math.isfinite(s.throttle_pct):
            t.append(f"   throttle {s.throttle_pct:3.0f} %", style="white")
        minutes, seconds = divmod(int(s.elapsed_s), 60)
        t.append(f"   ride {minutes:d}:{seconds:02d}", style=_DIM)
        if s.recording:
            t.append(f"   REC {s.recording}", style=_WARN)
        for sensor, rms in s.vibration.items():
            kind = s.vibration_weighting.get(sensor, "weighted")
            how = "unweighted (no rider weighting here)" if kind == "none" else kind
            t.append(f"\nvibration {sensor}: {rms:.2f} m/s² {how}, last 2 s", style="white")
        return t

    def _cylinders(self, s: LiveState) -> Table:
        tab = Table(title="misfires per cylinder", title_justify="left", box=box.SIMPLE_HEAD,
                    pad_edge=False, padding=(0, 1), show_edge=False)
        for col in ("cyl", "events", "misf", "part", "200r %", "contr"):
            tab.add_column(col, justify="right", no_wrap=True)
        for c in s.cylinders:
            rate = "-" if c.rate200_pct is None else f"{c.rate200_pct:.1f}"
            over = c.rate200_pct is not None and c.rate200_pct > self.alert_pct
            style = _ALERT if over else (_OK if c.rate200_pct is not None else _DIM)
            contrib = "-" if c.contribution is None else f"{c.contribution:.2f}"
            tab.add_row(str(c.cylinder), str(c.events), str(c.misfires), str(c.partial),
                        Text(rate, style=style), contrib)
        return tab

    def _intervals(self, s: LiveState) -> Table:
        title = "firing intervals, deg" if s.wheel_learnt else "intervals: wheel not learnt yet"
        tab = Table(title=title, title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False,
                    padding=(0, 1), min_width=len(title), show_edge=False)
        for col in ("pair", "exp", "seen", "check"):
            tab.add_column(col, justify="right", no_wrap=True)
        for i in s.intervals:
            if i.observed_deg is None:
                obs, check = "-", Text("waiting", style=_DIM)
            else:
                obs = f"{i.observed_deg:.1f}"
                off = abs(i.observed_deg - i.expected_deg) > s.interval_tolerance_deg
                if not s.wheel_learnt:
                    check = Text("not yet", style=_DIM)
                else:
                    check = Text("OFF", style=_WARN) if off else Text("ok", style=_OK)
            tab.add_row(f"{i.from_cyl}>{i.to_cyl}", f"{i.expected_deg:.0f}", obs, check)
        return tab

    def _health(self, s: LiveState) -> Text:
        bad = s.can_lost or s.serial_crc_errors or s.serial_reconnects
        return Text(
            f"CAN frames {s.can_frames}, lost {s.can_lost}; serial CRC errors "
            f"{s.serial_crc_errors}, reconnects {s.serial_reconnects}",
            style=_WARN if bad else _DIM,
        )
