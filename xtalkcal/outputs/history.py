"""A pair's history (or the whole ledger's) as rows, a text table or CSV: dates are the UTC
and local times each entry was stored, never rig seconds."""

from __future__ import annotations

import csv
import datetime as dt
import io
import math

from xtalkcal.outputs.from_ledger import entry_moment
from xtalkcal.outputs.palette import COLOURS, SERIES

__all__ = ["HISTORY_COLUMNS", "history_rows", "history_table", "history_csv", "plot_ledger_drift"]

HISTORY_COLUMNS = ("stored_utc", "stored_local", "aggressor_line", "victim", "kind",
                   "method", "verdict", "magnitude_db", "phase_deg", "stderr_db", "shots",
                   "tag", "reason")


def history_rows(ledger, *, pair: tuple[str, str] | None = None,
                 until: dt.datetime | None = None) -> list[dict[str, object]]:
    """Every entry (of ``pair`` if given) stored by ``until``, oldest first."""
    entries = ledger.history(*pair) if pair is not None else ledger.entries()
    rows = []
    for e in sorted(entries, key=lambda e: (entry_moment(e), e.seq, e.position)):
        when = entry_moment(e)
        if until is not None and when > until:
            continue
        ok = e.accepted
        sx = math.sqrt(max(e.covariance[0][0] + e.covariance[1][1], 0.0)) if ok else math.nan
        rows.append({
            "stored_utc": when.astimezone(dt.timezone.utc).isoformat(timespec="seconds"),
            "stored_local": when.astimezone().isoformat(timespec="seconds"),
            "aggressor_line": e.aggressor, "victim": e.victim, "kind": e.kind,
            "method": e.method, "verdict": e.verdict,
            "magnitude_db": 20 * math.log10(abs(e.value)) if ok and e.value else math.nan,
            "phase_deg": math.degrees(math.atan2(e.value.imag, e.value.real)) if ok
            else math.nan,
            "stderr_db": 20 * math.log10(sx) if ok and sx > 0 else math.nan,
            "shots": e.shots, "tag": e.tag, "reason": e.reason})
    return rows


def _num(v: object, fmt: str) -> str:
    return "" if isinstance(v, float) and not math.isfinite(v) else format(v, fmt)


def history_table(rows: list[dict[str, object]]) -> str:
    """A text table, one line per entry."""
    head = (f"{'stored (UTC)':<25} {'line':>5} → {'victim':<6} {'kind':<8} {'method':<9} "
            f"{'|X| dB':>7} {'arg X':>7} {'σ dB':>7} {'shots':>8}  verdict")
    out = [head]
    for r in rows:
        out.append(f"{r['stored_utc']:<25} {r['aggressor_line']:>5} → {r['victim']:<6} "
                   f"{r['kind']:<8} {r['method']:<9} {_num(r['magnitude_db'], '7.1f'):>7} "
                   f"{_num(r['phase_deg'], '7.1f'):>7} {_num(r['stderr_db'], '7.1f'):>7} "
                   f"{r['shots']:>8}  {r['verdict']}"
                   + (f" ({r['reason']})" if r["reason"] else ""))
    return "\n".join(out)


def history_csv(rows: list[dict[str, object]]) -> str:
    """CSV with a header line (empty cells where a rejected entry has no number)."""
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=HISTORY_COLUMNS, lineterminator="\n")
    w.writeheader()
    for r in rows:
        w.writerow({k: ("" if isinstance(v, float) and not math.isfinite(v) else v)
                    for k, v in r.items()})
    return buf.getvalue()


def plot_ledger_drift(ledger, *, until: dt.datetime | None = None, tolerance_db: float = -45.0,
                      ax=None):
    """Each compensated pair's move since its first null, |X(t) − X(t₀)| in dB, against the
    time each entry was stored (UTC); ±1σ bars; the re-check tolerance as a line.

    Only pairs with more than one accepted null or re-check stored by ``until`` are drawn.
    Returns the Axes, or None if no pair has a history to show.
    """
    import matplotlib.dates as mdates
    import matplotlib.pyplot as plt

    series = []
    for pair in ledger.pairs():
        es = [e for e in ledger.history(*pair) if e.accepted and e.kind != "survey"
              and (until is None or entry_moment(e) <= until)]
        if len(es) > 1:
            series.append((pair, es))
    if not series:
        return None
    ax = ax or plt.subplots(figsize=(7.5, 4.2))[1]
    for n, ((a, v), es) in enumerate(series):
        x0 = es[0].value
        t = [entry_moment(e) for e in es[1:]]
        d = [abs(e.value - x0) for e in es[1:]]
        s = [math.sqrt(max(e.covariance[0][0] + e.covariance[1][1], 0.0)) for e in es[1:]]
        db = [20 * math.log10(max(x, 1e-12)) for x in d]
        lo = [db_i - 20 * math.log10(max(x - si, 1e-12)) if x > si else 0.0
              for db_i, x, si in zip(db, d, s, strict=True)]
        hi = [20 * math.log10(x + si) - db_i for db_i, x, si in zip(db, d, s, strict=True)]
        ax.errorbar(t, db, yerr=[lo, hi], marker="o", ms=3, lw=1, capsize=2,
                    color=SERIES[n % len(SERIES)], label=f"{a} → {v}")
    ax.axhline(tolerance_db, color=COLOURS["tolerance"], ls="--", lw=1,
               label=f"re-check tolerance {tolerance_db:g} dB")
    ax.set_xlabel("stored (UTC)")
    ax.set_ylabel("|X − X at first null| (dB)")
    ax.set_title(f"{ledger.chip}: moves of the stored nulls (measured, ±1σ)")
    ax.legend(fontsize=7, ncol=2)
    locator = mdates.AutoDateLocator()
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator, tz=dt.timezone.utc))
    return ax
