"""The time-aligned channel view of a run and the zoom on one event."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from crankbeat.dsp.events import COUNTED_VERDICTS, FIRED, FUEL_CUT, MISFIRE, UNUSABLE, VERDICT_NAMES
from crankbeat.logger.figures import (
    channel_view,
    event_crank,
    event_neighbourhood,
    ride_start,
)
from crankbeat.logger.report.style import (
    MISFIRE_COLOUR,
    MUTED_COLOUR,
    THRESHOLD_COLOUR,
    cyl_colour,
    new_figure,
    save,
)
from crankbeat.logger.store import Store

FUEL_CUT_COLOUR = "#5c6f7f"

#: Axis label per stored channel (units as the rig files give them).
CHANNEL_LABELS = {"rpm": "engine speed [rpm]", "throttle": "throttle [%]", "gear": "gear [-]",
                  "road_speed": "road speed [km/h]", "coolant": "coolant [°C]"}


def plot_channels(store: Store, run_id: int, path: Path) -> Path | None:
    """Stored channels and the per-event metric on one time axis (s into the ride), misfires
    and unusable events marked, rough-road spans shaded, the wheel correction's start drawn.
    None when the run has neither channels nor events."""
    view = channel_view(store, run_id)
    names = list(view["channels"])
    if not names and not len(view["events"]):
        return None
    n = len(names) + 1
    fig, axes = new_figure(10.0, 1.35 * n + 1.6, nrows=n, sharex=True, squeeze=False,
                           gridspec_kw={"height_ratios": [1.0] * len(names) + [2.2]})
    for ax, name in zip(axes[:-1, 0], names, strict=True):
        t, v = view["channels"][name]
        ax.plot(t, v, lw=1.0, color="#1f6f8b", drawstyle="steps-post" if name == "gear"
                else "default")
        ax.set_ylabel(CHANNEL_LABELS.get(name, name), rotation=0, ha="right", va="center")
    _draw_metric(axes[-1, 0], view["events"])
    for ax in axes[:, 0]:
        for a, b in view["masked_spans"]:
            ax.axvspan(a, b, color="#b8a200", alpha=0.15, lw=0)
        for a, b in view["fuel_cut_spans"]:
            ax.axvspan(a, b, facecolor="none", edgecolor=FUEL_CUT_COLOUR, hatch="///", lw=0,
                       alpha=0.5)
        if view["correction_from"] is not None:
            ax.axvline(view["correction_from"], color="#4f8f3a", lw=1.0, ls="-.")
    axes[-1, 0].set_xlabel("time into the ride [s]")
    marks = ["shaded: rough road, events masked", "hatched: overrun fuel cut, not judged"]
    if view["correction_from"] is not None:
        marks.append(f"dash-dot: wheel correction from {view['correction_from']:.1f} s")
    fig.suptitle(f"Run {run_id}: engine and bike channels and the per-event misfire metric "
                 f"against time\n{'; '.join(marks)}", fontsize=9)
    save(fig, path)
    return path


def _draw_metric(ax, ev: np.ndarray) -> None:
    fired = ev[ev["verdict"] == FIRED]
    for c in sorted(set(fired["cylinder"].tolist())):
        sel = fired[fired["cylinder"] == c]
        ax.plot(sel["t"], sel["metric"], ".", ms=1.5, color=cyl_colour(c), label=f"cyl {c}",
                rasterized=True)
    mis = ev[ev["verdict"] == MISFIRE]
    bad = ev[ev["verdict"] == UNUSABLE]
    ax.plot(mis["t"], mis["metric"], "x", ms=5, color=MISFIRE_COLOUR,
            label=f"misfire ({len(mis)})")
    n_cut = int(np.sum(ev["verdict"] == FUEL_CUT))
    if n_cut:
        ax.fill_between([], [], facecolor="none", edgecolor=FUEL_CUT_COLOUR, hatch="///",
                        lw=0, label=f"fuel cut ({n_cut} events)")
    if len(bad):
        lo = float(np.nanpercentile(ev["metric"], 1)) if np.isfinite(ev["metric"]).any() else 0
        ax.plot(bad["t"], np.full(len(bad), lo), "^", ms=4, color=MUTED_COLOUR,
                label=f"unusable ({len(bad)})")
    order = np.argsort(ev["t"])
    ax.plot(ev["t"][order], ev["threshold"][order], lw=0.9, color=THRESHOLD_COLOUR,
            label="threshold")
    judged = ev["metric"][np.isin(ev["verdict"], COUNTED_VERDICTS)]
    judged = judged[np.isfinite(judged)]
    if judged.size:
        ax.set_ylim(float(np.percentile(judged, 0.2)) - 1.0,
                    max(float(np.percentile(judged, 99.9)), float(np.nanmax(ev["threshold"])
                                                                   if len(ev) else 0)) + 2.0)
    ax.set_ylabel("metric [-]", rotation=0, ha="right", va="center")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, markerscale=2)


def plot_event_zoom(store: Store, run_id: int, index: int, path: Path, *, cycles: int = 10
                    ) -> Path:
    """The zoom on event ``index``: the raw tooth periods of the cycles around it, the crank
    speed over its compression and expansion against its cylinder's reference (both read again
    from the run's CAN recording, :func:`logger.figures.event_crank`), and the metric of the
    events ``cycles`` working cycles either side with the reference and threshold."""
    ev = store.events(run_id)
    crank = event_crank(store, run_id, index)
    centre = ev[index]
    t0 = ride_start(store, run_id, ev)
    what = (f"cylinder {centre['cylinder']}, {centre['rpm']:.0f} rpm, "
            f"{VERDICT_NAMES.get(int(centre['verdict']), '?')}")
    if crank["why"]:
        fig, ax = new_figure(10.0, 4.0)
        _draw_zoom_metric(ax, ev, index, cycles)
        fig.suptitle(f"Run {run_id}: misfire metric around the event at {centre['t'] - t0:.2f} s "
                     f"into the ride ({what}); no tooth periods: {crank['why']}", fontsize=9)
    else:
        fig, axes = new_figure(10.0, 9.5, nrows=3, gridspec_kw={"height_ratios": [1, 1.2, 1.2]})
        _draw_periods(axes[0], crank, centre, t0)
        _draw_speed(axes[1], crank, centre)
        _draw_zoom_metric(axes[2], ev, index, cycles)
        fig.suptitle(f"Run {run_id}: the event at {centre['t'] - t0:.2f} s into the ride "
                     f"({what}): tooth periods, crank speed against its cylinder's reference, "
                     "misfire metric", fontsize=9)
    save(fig, path)
    return path


def _draw_periods(ax, crank: dict, centre, t0: float) -> None:
    one = crank["teeth"] == 1
    ax.plot(crank["t"][one], crank["period_ms"][one], ".", ms=2.5, color="#1f6f8b",
            label="tooth period, as the bike sent it")
    gap = ~one
    if gap.any():
        ax.plot(crank["t"][gap], crank["period_ms"][gap] / crank["teeth"][gap], "v", ms=4,
                color=MUTED_COLOUR, label="the gap's period / teeth it spans")
    for t, c in crank["tdcs"]:
        this = abs(t - (centre["t"] - t0)) < 1e-6 and c == centre["cylinder"]
        ax.axvline(t, color=MISFIRE_COLOUR if this else cyl_colour(c), lw=1.6 if this else 0.7,
                   ls="-" if this else ":")
        ax.annotate(f"{c}", (t, 0.97), xycoords=("data", "axes fraction"), fontsize=7,
                    ha="left", va="top", color=cyl_colour(c))
    ax.legend(loc="lower right", fontsize=7, framealpha=0.8)
    ax.set_xlabel("time into the ride [s] (lines: firing TDCs, numbered by cylinder; solid: "
                  "this event)")
    ax.set_ylabel("tooth period [ms]")
    ax.set_title("raw tooth periods, two working cycles either side",
                 loc="left")


def _draw_speed(ax, crank: dict, centre) -> None:
    colour = MISFIRE_COLOUR if centre["verdict"] == MISFIRE else cyl_colour(centre["cylinder"])
    ax.plot(crank["angle"], crank["rpm"], "-", lw=1.2, color=colour, label="this event")
    if crank["ref_count"]:
        ax.plot(crank["ref_angle"], crank["ref_rpm"], "--", lw=1.2, color=THRESHOLD_COLOUR,
                label=f"cyl {centre['cylinder']} reference: median of {crank['ref_count']} "
                      "fired events nearby, at this event's mean speed")
    ax.axvline(0.0, color=MUTED_COLOUR, lw=0.8)
    ax.set_xlabel(f"crank angle from cylinder {centre['cylinder']}'s firing TDC [deg] "
                  "(a misfire loses the rise after TDC)")
    ax.set_ylabel("crank speed [rpm]")
    ax.set_title("crank speed through this event's compression and expansion", loc="left")
    ax.legend(loc="lower left", fontsize=7, framealpha=0.8)


def _draw_zoom_metric(ax, ev: np.ndarray, index: int, cycles: int) -> None:
    near = event_neighbourhood(ev, index, cycles=cycles)
    e = near["events"]
    centre = e[near["centre"]]
    x = np.arange(len(e))
    colours = [MISFIRE_COLOUR if v == MISFIRE else MUTED_COLOUR if v != FIRED
               else cyl_colour(c) for c, v in zip(e["cylinder"], e["verdict"], strict=True)]
    ax.bar(x, np.nan_to_num(e["metric"]), color=colours, width=0.8)
    ax.bar([near["centre"]], [np.nan_to_num(centre["metric"])], width=0.8, fill=False,
           edgecolor="#000000", lw=1.8, label="this event")
    ax.step(np.append(x, x[-1] + 1) - 0.5, np.append(e["threshold"], e["threshold"][-1]),
            where="post", color=THRESHOLD_COLOUR, lw=1.0, label="threshold")
    own = e["cylinder"] == centre["cylinder"]
    ax.plot(x[own], np.full(own.sum(), near["reference"]), "_", ms=14, mew=2,
            color=cyl_colour(int(centre["cylinder"])),
            label=f"cyl {centre['cylinder']} reference (run median {near['reference']:.2f})")
    ax.set_xticks(x, [f"{c}" for c in e["cylinder"]], fontsize=7)
    ax.set_xlabel(f"cylinder of each firing event, in firing order (cycles "
                  f"{e['cycle'].min()}..{e['cycle'].max()}); red = misfire, grey = not judged")
    ax.set_ylabel("metric [-]")
    ax.set_title(f"misfire metric, {cycles} working cycles either side", loc="left")
    ax.legend(loc="upper left", fontsize=7, framealpha=0.8)
