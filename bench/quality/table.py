"""The one table of `make quality`: a row per cell (ride kind x rig), then the overall targets."""

from __future__ import annotations

from dataclasses import dataclass

from bench.quality.rides import KINDS

#: The band each kind is judged on, and its detection / false-alarm targets (%).
MID = ("mid", 99.5, 0.05)
HIGH = ("high", 97.0, 0.2)
ROW_BAND = {"steady": MID, "sweep": MID, "retard": MID, "fuelcut": MID, "highlight": HIGH}
MID_POOL = ("steady", "sweep", "retard", "fuelcut")
INTERVAL_TOL_DEG = 1.5


@dataclass
class Row:
    cell: str
    rides: str
    det: str
    fa: str
    unusable: str
    layout: str
    interval: str
    target: str
    ok: bool

    @property
    def result(self) -> str:
        return "PASS" if self.ok else "MISS"


def _sum(results: list[dict], band: str, key: str) -> int:
    return sum(int(r["bands"].get(band, {}).get(key, 0)) for r in results)


def _pct(num: int, den: int) -> float | None:
    return None if den == 0 else 100.0 * num / den


def _fmt(x: float | None, digits: int = 2) -> str:
    return "-" if x is None else f"{x:.{digits}f}"


def _rates(results, band):
    det = _pct(_sum(results, band, "detected"), _sum(results, band, "true_mis"))
    fa = _pct(_sum(results, band, "false_alarms"), _sum(results, band, "true_fired"))
    unus = _pct(_sum(results, band, "unusable"), _sum(results, band, "matched"))
    return det, fa, unus


def _layout_word(r: dict) -> str:
    m = r.get("layout_matches_rig")
    if m is None:  # "open": another layout fits a little better, not clearly (not judged)
        return "open" if r.get("layout_best") else "n/a"
    if r["kind"] == "layout":
        return "warned" if m is False else "wrong"
    return "ok" if m else "wrong"


def _layout_cell(results: list[dict]) -> str:
    words = [_layout_word(r) for r in results]
    return " ".join(f"{w} {words.count(w)}" for w in ("ok", "warned", "open", "wrong", "n/a")
                    if words.count(w))


def _interval_cell(results: list[dict]) -> str:
    errs = [r["interval_err_deg"] for r in results if r.get("interval_err_deg") is not None]
    judged = sum(1 for r in results if r.get("interval_judged"))
    if not errs:
        return "not judged"
    flag = sum(1 for r in results if r.get("interval_flagged"))
    return f"{max(errs):.1f} ({judged}j {flag}f)"


def _cell_row(kind: str, rig: str, results: list[dict], errors: int) -> Row:
    n = f"{len(results)}" + (f"+{errors}err" if errors else "")
    lay, itv = _layout_cell(results), _interval_cell(results)
    band = ROW_BAND.get(kind)
    if band:
        name, t_det, t_fa = band
        det, fa, unus = _rates(results, name)
        ok = det is not None and det >= t_det and fa is not None and fa <= t_fa
        target = f"det>={t_det} fa<={t_fa} ({name})"
        if kind == "retard":
            ok = ok and all(r.get("retard_flagged") for r in results)
            target += ", retard flagged"
        if kind == "sweep":
            ok = ok and _intervals_ok(results)
            target += f", itv<={INTERVAL_TOL_DEG}"
    else:
        det, fa, unus = _rates(results, "all")
        if kind == "rough":
            mis = sum(r["misfire_verdicts"] for r in results)
            ok, target = mis == 0, f"0 misfires (got {mis})"
        elif kind == "layout":
            ok = all(_layout_word(r) == "warned" and not r["alert"] for r in results)
            target = "warned, no alert"
        else:  # dead
            det = _pct(_sum(results, "all", "raw_detected"), _sum(results, "all", "raw_true_mis"))
            ok, target = det is not None and det >= 99.0, "dead cyl >= 99 % of events"
    ok = ok and bool(results) and not errors
    return Row(f"{kind} {rig}", n, _fmt(det), _fmt(fa, 3), _fmt(unus, 1), lay, itv, target, ok)


def _intervals_ok(results: list[dict]) -> bool:
    return bool(results) and all(
        r.get("interval_err_deg") is not None and r["interval_err_deg"] <= INTERVAL_TOL_DEG
        and not r.get("interval_flagged") for r in results)


def _overall(by_cell: dict, errors: int) -> list[Row]:
    def pool(kinds):
        return [r for (k, _), rs in by_cell.items() if k in kinds for r in rs]

    rows = []
    for label, kinds, (band, t_det, t_fa) in (
            ("2000-9000 rpm", MID_POOL, MID), ("8000-10500 <12 %", ("highlight",), HIGH)):
        rs = pool(kinds)
        det, fa, unus = _rates(rs, band)
        ok = det is not None and det >= t_det and fa is not None and fa <= t_fa
        rows.append(Row(f"ALL {label}", str(len(rs)), _fmt(det), _fmt(fa, 3), _fmt(unus, 1), "",
                        "", f"det>={t_det} fa<={t_fa}", ok))
    rough = pool(("rough",))
    mis = sum(r["misfire_verdicts"] for r in rough)
    rows.append(Row("ALL rough road", str(len(rough)), "", "", "", "", "",
                    f"0 misfires (got {mis})", bool(rough) and mis == 0))
    lay = pool(("layout",))
    warned = sum(_layout_word(r) == "warned" for r in lay)
    alerts = sum(r["alert"] for r in lay)
    rows.append(Row("ALL wrong layout", str(len(lay)), "", "", "", f"warned {warned}", "",
                    f"all warned, 0 alerts (got {alerts})",
                    bool(lay) and warned == len(lay) and alerts == 0))
    dead = pool(("dead",))
    det = _pct(_sum(dead, "all", "raw_detected"), _sum(dead, "all", "raw_true_mis"))
    rows.append(Row("ALL dead cylinder", str(len(dead)), _fmt(det), "", "", "", "",
                    "dead cyl >= 99 %", det is not None and det >= 99.0))
    sw = pool(("sweep",))
    rows.append(Row("ALL intervals 60 s, no cut", str(len(sw)), "", "", "", "",
                    _interval_cell(sw), f"|err|<={INTERVAL_TOL_DEG}, none flagged",
                    _intervals_ok(sw)))
    rt = pool(("retard",))
    n_flag = sum(bool(r.get("retard_flagged")) for r in rt)
    rows.append(Row("ALL 10 deg retard", str(len(rt)), "", "", "", "", f"flagged {n_flag}",
                    "every retard flagged", bool(rt) and n_flag == len(rt)))
    right = [r for (k, _), rs in by_cell.items() if k != "layout" for r in rs]
    ok_lay = sum(_layout_word(r) == "ok" for r in right)
    rows.append(Row("ALL layout on right rig", str(len(right)), "", "", "", _layout_cell(right), "",
                    "layout ok on every ride", bool(right) and ok_lay == len(right)))
    every = [r for rs in by_cell.values() for r in rs]
    untimed = sum(r.get("untimed", 0) for r in every)
    rows.append(Row("ALL events timed", str(len(every)), "", "", "", "", "",
                    f"0 untimed (got {untimed})", untimed == 0 and errors == 0))
    return rows


def build(results: list[dict], errors: list[dict]) -> list[Row]:
    """Rows in matrix order (kinds as :data:`KINDS`, rigs as run)."""
    by_cell: dict[tuple[str, str], list[dict]] = {}
    err_cell: dict[tuple[str, str], int] = {}
    for r in results:
        by_cell.setdefault((r["kind"], r["rig"]), []).append(r)
    for e in errors:
        err_cell[(e["kind"], e["rig"])] = err_cell.get((e["kind"], e["rig"]), 0) + 1
        by_cell.setdefault((e["kind"], e["rig"]), [])
    order = sorted(by_cell, key=lambda c: (list(KINDS).index(c[0]), c[1]))
    rows = [_cell_row(k, g, by_cell[(k, g)], err_cell.get((k, g), 0)) for k, g in order]
    return rows + _overall({c: by_cell[c] for c in order}, len(errors))


HEAD = ("cell", "rides", "det %", "fa %", "unus %", "layout", "itv err deg", "target", "result")


def render(rows: list[Row]) -> str:
    cells = [HEAD] + [(r.cell, r.rides, r.det, r.fa, r.unusable, r.layout, r.interval, r.target,
                       r.result) for r in rows]
    width = [max(len(c[i]) for c in cells) for i in range(len(HEAD))]
    lines = []
    for i, c in enumerate(cells):
        lines.append("  ".join(v.ljust(w) for v, w in zip(c, width)).rstrip())
        if i == 0 or (i < len(rows) and not rows[i - 1].cell.startswith("ALL")
                      and rows[i].cell.startswith("ALL")):
            lines.append("-" * len(lines[0]))
    return "\n".join(lines)
