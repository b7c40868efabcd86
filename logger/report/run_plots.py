"""The figures of one run, each drawn from the store's rows only."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from matplotlib.colors import LogNorm

from crankbeat.dsp.events import FIRED, MISFIRE, PARTIAL
from crankbeat.logger.figures import (
    interval_pairs,
    main_orders,
    order_cuts,
    order_grid,
    predicted_order_marks,
    run_engine,
    window_timeline,
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

# Above this many fired events per cylinder the dots are thinned (every misfire is kept).
_MAX_DOTS = 40_000


def plot_metric(ev: np.ndarray, path: Path, *, names: dict[int, str] | None = None,
                t0: float | None = None) -> Path | None:
    """Per-event metric over time, one panel per cylinder, threshold and misfires marked.

    ``names``: cylinder -> shown name ("2/3" where the run's 720° phase is unknown); ``t0``:
    the ride's start (:func:`logger.figures.ride_start`; default the first event)."""
    names = names or {}
    cyls = sorted(set(ev["cylinder"].tolist()))
    if not cyls:
        return None
    fig, axes = new_figure(10.0, 2.0 * len(cyls) + 0.9, nrows=len(cyls), sharex=True,
                           squeeze=False)
    # CAN logs carry wall-clock seconds (~1.7e9): plot time since the first event instead.
    if t0 is None:
        finite = ev["t"][np.isfinite(ev["t"])]
        t0 = float(finite.min()) if finite.size else 0.0
    ev = ev.copy()
    ev["t"] = ev["t"] - t0
    for ax, c in zip(axes[:, 0], cyls, strict=True):
        e = ev[ev["cylinder"] == c]
        fired = e[e["verdict"] == FIRED]
        if len(fired) > _MAX_DOTS:
            fired = fired[:: int(np.ceil(len(fired) / _MAX_DOTS))]
        other = e[~np.isin(e["verdict"], (FIRED, MISFIRE, PARTIAL))]
        mis = e[e["verdict"] == MISFIRE]
        part = e[e["verdict"] == PARTIAL]
        ax.plot(fired["t"], fired["metric"], ".", ms=2, color=cyl_colour(c), label="fired",
                rasterized=True)
        if len(other):
            ax.plot(other["t"], other["metric"], ".", ms=3, color=MUTED_COLOUR,
                    label=f"not judged ({len(other)})", rasterized=True)
        if len(part):  # hollow: judged weak, not a whole misfire
            ax.plot(part["t"], part["metric"], "^", ms=4, mfc="none", mew=1.0,
                    color=MISFIRE_COLOUR, label=f"partial burn ({len(part)})")
        ax.plot(mis["t"], mis["metric"], "x", ms=5, mew=1.2, color=MISFIRE_COLOUR,
                label=f"misfire ({len(mis)})")
        ax.plot(e["t"], e["threshold"], "-", lw=1.0, color=THRESHOLD_COLOUR, label="threshold")
        _robust_ylim(ax, e)
        ax.set_title(f"cylinder {names.get(c, c)}", loc="left", fontsize=9)
        ax.set_ylabel("metric [-]")
        # Outside the axes, so that no marker is hidden behind the legend.
        ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), markerscale=2, frameon=False)
    axes[-1, 0].set_xlabel(f"time into the ride [s]  (CAN time {t0:.3f} s)")
    fig.suptitle("Speed-fluctuation metric per firing event (larger = weaker combustion); "
                 "not judged = masked, unusable or fuel cut", fontsize=9)
    save(fig, path)
    return path


def _robust_ylim(ax, e: np.ndarray) -> None:
    """Y range from the judged events and the threshold, so that a few wild values of events
    that were not judged (sync loss, overrun) do not flatten the panel; says what is cut off."""
    judged = e["metric"][np.isin(e["verdict"], (FIRED, MISFIRE, PARTIAL))
                         & np.isfinite(e["metric"])]
    thr = e["threshold"][np.isfinite(e["threshold"])]
    if not judged.size:
        return
    lo = float(np.percentile(judged, 0.2))
    hi = float(np.percentile(judged, 99.8))
    if thr.size:
        lo, hi = min(lo, float(thr.min())), max(hi, float(thr.max()))
    pad = 0.1 * (hi - lo or 1.0)
    lo, hi = lo - pad, hi + pad
    allm = e["metric"][np.isfinite(e["metric"])]
    cut = int(np.sum((allm < lo) | (allm > hi)))
    ax.set_ylim(lo, hi)
    if cut:
        ax.text(0.995, 0.03, f"{cut} events beyond the axis", transform=ax.transAxes,
                ha="right", va="bottom", fontsize=7, color="#555555")


def plot_windows(store: Store, run_id: int, ev: np.ndarray, path: Path,
                 *, alert_pct: float | None = None, names: dict[int, str] | None = None
                 ) -> Path | None:
    """Misfire rate per 200- and per 1000-revolution window against time into the ride: all
    cylinders together (the figure the alert is judged on) and each cylinder; the rig's alert
    level on the 200-revolution panel. Windows cut short by the end of the ride are dotted and
    not judged. None when the run holds no events."""
    if not len(ev):
        return None
    fig, axes = new_figure(10.0, 5.6, nrows=2, sharex=True, squeeze=False)
    for ax, revs in zip(axes[:, 0], (200, 1000), strict=True):
        tl = window_timeline(store, run_id, ev, revolutions=revs)
        _draw_windows(ax, tl, names or {})
        if revs == 200 and alert_pct is not None:
            ax.axhline(alert_pct, color=MISFIRE_COLOUR, lw=1.2, ls="--",
                       label=f"rig alert level {alert_pct:g} %")
            over = tl["complete"] & (tl["rate_pct"] > alert_pct)
            for a, b in zip(tl["t_start"][over], tl["t_end"][over], strict=True):
                ax.axvspan(a, b, color=MISFIRE_COLOUR, alpha=0.08, lw=0)
        whole = int(np.sum(tl["complete"]))
        ax.set_title(f"{revs}-revolution windows ({whole} whole"
                     + (", none: not judged" if not whole else "")
                     + (", the alert is judged on these" if revs == 200 else "") + ")",
                     loc="left", fontsize=9)
        ax.set_ylabel("misfire rate [%]")
        ax.set_ylim(bottom=0)
        ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    axes[-1, 0].set_xlabel("time into the ride [s]")
    fig.suptitle("Misfire rate per window of 200 and of 1000 crank revolutions against time "
                 "(all cylinders and each one)", fontsize=9)
    save(fig, path)
    return path


def _draw_windows(ax, tl: dict, names: dict[int, str]) -> None:
    """Each window as a level segment over its time span: all cylinders bold, each cylinder
    thin; dotted where the window is not whole."""
    whole = tl["complete"]
    for j in range(tl["per_cylinder"].shape[1]):
        c = j + 1
        y = tl["per_cylinder"][:, j]
        for sel, ls in ((whole, "-"), (~whole, ":")):
            ax.hlines(y[sel], tl["t_start"][sel], tl["t_end"][sel], colors=cyl_colour(c),
                      lw=1.2, ls=ls, label=f"cyl {names.get(c, c)}" if ls == "-" else None)
    for sel, ls in ((whole, "-"), (~whole, ":")):
        ax.hlines(tl["rate_pct"][sel], tl["t_start"][sel], tl["t_end"][sel],
                  colors=THRESHOLD_COLOUR, lw=2.4, ls=ls,
                  label="all cylinders" if ls == "-" else "not whole (not judged)")


def plot_intervals(ev: np.ndarray, path: Path, *, engine, tolerance_deg: float | None = None,
                   summary: dict | None = None,
                   checked: dict[int, tuple[float, int]] | None = None,
                   names: dict[int, str] | None = None) -> Path | None:
    """Histogram of observed firing intervals of fired events, one panel per firing pair
    (``1 → 3``), in firing order.

    Only the events the run's interval check used (from the tooth-error correction on); each
    panel gives the pair's mean from that check (``checked``: to_cyl -> (error, n)), the same
    number ``show`` prints.
    """
    pairs = [p for p in interval_pairs(ev, summary, engine) if p["observed_deg"].size]
    if not pairs:
        return None
    checked, names = checked or {}, names or {}
    ncols = 1 if len(pairs) == 1 else 2
    nrows = -(-len(pairs) // ncols)
    fig, axes = new_figure(11.0 if ncols == 2 else 6.5, 3.0 * nrows + 0.4, nrows=nrows,
                           ncols=ncols, squeeze=False)
    for ax, p in zip(axes.flat, pairs, strict=False):
        _draw_pair(ax, p, tolerance_deg, checked, names)
    for ax in list(axes.flat)[len(pairs):]:
        ax.set_visible(False)
    fig.suptitle("Firing intervals per firing pair (events after the wheel correction; "
                 "means: the run's interval check)", fontsize=9)
    save(fig, path)
    return path


def _draw_pair(ax, p: dict, tolerance_deg: float | None, checked: dict, names: dict) -> None:
    g, obs, c = p["expected_deg"], p["observed_deg"], p["to_cyl"]
    span = max(6.0, float(np.nanpercentile(np.abs(obs - g), 99.5)) * 1.2)
    bins = np.linspace(g - span, g + span, 61)
    ax.hist(np.clip(obs, bins[0], bins[-1]), bins=bins, histtype="stepfilled", alpha=0.35,
            color=cyl_colour(c), edgecolor=cyl_colour(c), label=f"{obs.size} intervals")
    ax.axvline(g, color=THRESHOLD_COLOUR, lw=1.2, ls="--", label=f"expected {g:g}°")
    if c in checked:
        ax.axvline(g + checked[c][0], color=cyl_colour(c), lw=1.6,
                   label=f"mean {g + checked[c][0]:.2f}°")
    if tolerance_deg:
        ax.axvspan(g - tolerance_deg, g + tolerance_deg, color="#2bb3a3", alpha=0.12,
                   label=f"tolerance on the mean ±{tolerance_deg:g}°")
    outside = int(np.sum(np.abs(obs - g) > span))
    if outside:
        ax.text(0.99, 0.97, f"{outside} beyond the axis,\npiled at its ends",
                transform=ax.transAxes, ha="right", va="top", fontsize=7, color="#555555")
    ax.set_xlabel("observed firing interval [crank deg]")
    ax.set_ylabel("events")
    ax.set_title(f"cylinder {names.get(p['from_cyl'], p['from_cyl'])} → "
                 f"{names.get(c, c)}", loc="left", fontsize=9)
    ax.legend(loc="upper left", fontsize=7, frameon=False)


def plot_contribution(ev: np.ndarray, path: Path) -> Path | None:
    """Mean contribution per cylinder (fired events) with its spread."""
    e = ev[(ev["verdict"] == FIRED) & np.isfinite(ev["contribution"])]
    if not len(e):
        return None
    cyls = sorted(set(e["cylinder"].tolist()))
    means = [float(np.mean(e["contribution"][e["cylinder"] == c])) for c in cyls]
    sds = [float(np.std(e["contribution"][e["cylinder"] == c])) for c in cyls]
    fig, ax = new_figure(1.2 * len(cyls) + 4.5, 3.4)
    x = np.arange(len(cyls))
    # Dots with spread rather than bars from zero: a few per cent between cylinders must show.
    ax.errorbar(x, means, yerr=sds, fmt="none", ecolor="#555555", capsize=5, lw=1)
    ax.scatter(x, means, s=60, c=[cyl_colour(c) for c in cyls], zorder=3)
    # 1.0 is the engine's typical firing event (a running reference), not the mean of these dots
    ax.axhline(1.0, color=THRESHOLD_COLOUR, lw=1, ls="--", label="1 = typical firing event")
    ax.axhline(float(np.mean(means)), color=MUTED_COLOUR, lw=1, ls=":",
               label=f"mean of the cylinders {np.mean(means):.3f}")
    for i, m in enumerate(means):
        ax.annotate(f"{m:.3f}", (x[i], m), textcoords="offset points", xytext=(9, -3),
                    fontsize=8)
    ax.set_xticks(x, [str(c) for c in cyls])
    ax.set_xlim(-0.6, len(cyls) - 0.4)
    lo = min(m - s for m, s in zip(means, sds, strict=True))
    hi = max(m + s for m, s in zip(means, sds, strict=True))
    pad = max(0.02, 0.15 * (hi - lo))
    ax.set_ylim(min(lo, 1.0) - pad, max(hi, 1.0) + pad)
    ax.set_xlabel("cylinder")
    ax.set_ylabel("relative contribution [-]")
    ax.set_title("Contribution per cylinder: work of its fired events\n"
                 "relative to the engine's typical event (mean ± 1 s.d.)", loc="left")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    save(fig, path)
    return path


def plot_order_map(store: Store, run_id: int, path: Path, *, max_order: float = 8.0
                   ) -> Path | None:
    """Per sensor: the rpm-vs-order map (colour = amplitude, log scale, equal rpm bands) with
    the orders the layout predicts marked, and beside it the cuts of the main predicted orders
    against rpm. The vector-sum map is drawn when the store has one, else each axis."""
    keys = sorted({(m["sensor"], m["axis"]) for m in store.order_maps(run_id)})
    keys = [k for k in keys if k[1] == "sum"] or keys
    grids = [(k, order_grid(store, run_id, *k, max_order=max_order)) for k in keys]
    grids = [(k, g) for k, g in grids if g is not None]
    if not grids:
        return None
    marks = predicted_order_marks(run_engine(store, run_id), max_order=min(max_order, 6.0))
    fig, axes = new_figure(11.0, 4.2 * len(grids), nrows=len(grids), ncols=2, squeeze=False,
                           gridspec_kw={"width_ratios": (1.25, 1.0)})
    for row, ((sensor, axis), grid) in zip(axes, grids, strict=True):
        where = f"{sensor} ({'vector sum' if axis == 'sum' else axis})"
        _draw_order_map(fig, row[0], grid, marks, where)
        _draw_order_cuts(row[1], grid, main_orders(marks), where)
    fig.suptitle("Vibration by engine order and engine speed: the order map and the amplitude "
                 "of the main predicted orders against rpm", fontsize=9)
    save(fig, path)
    return path


def _draw_order_map(fig, ax, grid: dict, marks: list[dict], where: str) -> None:
    o = grid["orders"]
    do = float(np.diff(o).min()) if len(o) > 1 else 0.5
    o_edges = np.concatenate([o - do / 2, [o[-1] + do / 2]])
    amp = grid["amplitude"]
    top = float(np.nanmax(amp))
    # log colours: a weak cylinder's half order must stay visible beside the first order
    norm = LogNorm(vmin=max(top / 1000.0, float(np.nanmin(amp))), vmax=top)
    mesh = ax.pcolormesh(o_edges, grid["rpm_edges"], np.clip(amp, norm.vmin, None),
                         shading="flat", cmap="magma", norm=norm)
    fig.colorbar(mesh, ax=ax, label="amplitude [m/s²]")
    for m in marks:
        firing_only = m["sources"] == ["firing pulses"]
        ax.axvline(m["order"], color="#7fe0d4" if firing_only else "#ffffff", lw=0.9,
                   ls="--" if firing_only else ":", alpha=0.9)
        ax.text(m["order"], 1.01, f"{m['order']:g}", transform=ax.get_xaxis_transform(),
                ha="center", va="bottom", fontsize=6)
    ax.set_xlabel("engine order [per crank revolution]")
    ax.set_ylabel("engine speed [rpm]")
    ax.set_title(f"order map, {where}; marked: orders the layout predicts\n(dashed: firing "
                 "pulses, dotted: free force or couple; blank rows: rpm never held)",
                 loc="left", pad=14, fontsize=8)
    ax.set_xlim(0, o_edges[-1])
    ax.grid(False)


def _draw_order_cuts(ax, grid: dict, orders: list[float], where: str) -> None:
    for j, (order, (rpm, amp)) in enumerate(order_cuts(grid, orders).items()):
        ax.plot(rpm, amp, marker="o", ms=3, lw=1.2, color=cyl_colour(j + 1),
                label=f"order {order:g}")
    ax.set_yscale("log")
    ax.set_xlabel("engine speed, band centre [rpm]")
    ax.set_ylabel("amplitude [m/s²]")
    ax.set_title(f"order cuts, {where}\n(the lowest orders the layout predicts)", loc="left")
    ax.legend(loc="best", frameon=False)


def plot_vibration(store: Store, run_id: int, path: Path) -> Path | None:
    """Weighted (and unweighted) vibration r.m.s. against rpm, per sensor."""
    everything = store.vibration(run_id)
    # Rows without an rpm band are whole-run values: they go into the legend, not on the axis.
    rows = [r for r in everything if r["rpm_lo"] is not None and r["rpm_hi"] is not None]
    whole = {(r["sensor"], r["weighting"], r["axis"]): r["rms"] for r in everything
             if r["rpm_lo"] is None and r["rms"] is not None}
    if not rows:
        return None
    fig, ax = new_figure(10.0, 3.8)
    keys = sorted({(r["sensor"], r["weighting"], r["axis"]) for r in rows})
    shown = [k for k in keys if k[2] == "sum"] or keys
    for j, (sensor, weighting, axis) in enumerate(shown):
        sel = sorted((r for r in rows if (r["sensor"], r["weighting"], r["axis"]) ==
                      (sensor, weighting, axis)), key=lambda r: r["rpm_lo"])
        x = [(r["rpm_lo"] + r["rpm_hi"]) / 2 for r in sel]
        y = [np.nan if r["rms"] is None else r["rms"] for r in sel]
        style = "--" if weighting == "none" else "-"
        label = f"{sensor} {axis}, " + ("unweighted" if weighting == "none" else weighting)
        if (sensor, weighting, axis) in whole:
            label += f" (whole run {whole[(sensor, weighting, axis)]:.2f})"
        ax.plot(x, y, style, marker="o", ms=3, color=cyl_colour(j + 1), label=label)
    ax.set_xlabel("engine speed, band centre [rpm]")
    ax.set_ylabel("r.m.s. acceleration [m/s²]")
    ax.set_title(_vibration_title({k[1] for k in shown}))
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    ax.set_ylim(bottom=0)
    save(fig, path)
    return path


def _vibration_title(weightings: set[str]) -> str:
    """Says "weighted" only of weighted values, and names only the standards behind them."""
    named = []
    if "Wh" in weightings:
        named.append("Wh: hand-arm, ISO 5349-1")
    if weightings & {"Wk", "Wd"}:
        named.append("Wk, Wd: whole-body, ISO 2631-1")
    if "none" in weightings:
        named.append("unweighted: the location has no rider weighting")
    head = ("Weighted vibration" if "none" not in weightings
            else "Unweighted vibration" if weightings == {"none"} else "Vibration")
    return f"{head} against engine speed\n(" + "; ".join(named) + ")"
