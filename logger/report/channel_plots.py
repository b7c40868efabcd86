"""The time-aligned channel view of a run and the zoom on one event."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from crankbeat.dsp.events import FIRED, MISFIRE, UNUSABLE, VERDICT_NAMES
from crankbeat.logger.figures import channel_view, event_neighbourhood, ride_start
from crankbeat.logger.report.style import (
    MISFIRE_COLOUR,
    MUTED_COLOUR,
    THRESHOLD_COLOUR,
    cyl_colour,
    new_figure,
    save,
)
from crankbeat.logger.store import Store

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
        if view["correction_from"] is not None:
            ax.axvline(view["correction_from"], color="#4f8f3a", lw=1.0, ls="-.")
    axes[-1, 0].set_xlabel("time into the ride [s]")
    note = "shaded: masked (rough road)"
    if view["correction_from"] is not None:
        note += f"; dash-dot: wheel correction from {view['correction_from']:.1f} s"
    fig.suptitle(f"Run {run_id} on one time axis ({note})", fontsize=9)
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
    if len(bad):
        lo = float(np.nanpercentile(ev["metric"], 1)) if np.isfinite(ev["metric"]).any() else 0
        ax.plot(bad["t"], np.full(len(bad), lo), "^", ms=4, color=MUTED_COLOUR,
                label=f"unusable ({len(bad)})")
    order = np.argsort(ev["t"])
    ax.plot(ev["t"][order], ev["threshold"][order], lw=0.9, color=THRESHOLD_COLOUR,
            label="threshold")
    judged = ev["metric"][np.isin(ev["verdict"], (FIRED, MISFIRE))]
    judged = judged[np.isfinite(judged)]
    if judged.size:
        ax.set_ylim(float(np.percentile(judged, 0.2)) - 1.0,
                    max(float(np.percentile(judged, 99.9)), float(np.nanmax(ev["threshold"])
                                                                   if len(ev) else 0)) + 2.0)
    ax.set_ylabel("metric [-]", rotation=0, ha="right", va="center")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, markerscale=2)


def plot_event_zoom(store: Store, run_id: int, index: int, path: Path, *, cycles: int = 10
                    ) -> Path:
    """The metric of the events ``cycles`` working cycles either side of event ``index``, its
    cylinder's reference (median fired metric of the run) and threshold."""
    ev = store.events(run_id)
    near = event_neighbourhood(ev, index, cycles=cycles)
    e = near["events"]
    t0 = ride_start(store, run_id, ev)
    centre = e[near["centre"]]
    fig, ax = new_figure(10.0, 4.0)
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
    ax.set_title(f"Run {run_id}: event at {centre['t'] - t0:.2f} s into the ride, cylinder "
                 f"{centre['cylinder']}, {centre['rpm']:.0f} rpm, "
                 f"{VERDICT_NAMES.get(int(centre['verdict']), '?')}", loc="left")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    save(fig, path)
    return path
