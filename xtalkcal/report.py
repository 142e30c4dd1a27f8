"""A report folder: PNG figures, the matrix JSON, a Markdown summary and a self-contained HTML page."""

from __future__ import annotations

import base64
import html
import math
from pathlib import Path

import matplotlib.pyplot as plt

from xtalkcal.calibration import CalibrationResult
from xtalkcal.export import dumps, format_table
from xtalkcal.plot import plot_matrix_db, plot_matrix_phase, plot_null_landscape, plot_residuals

__all__ = ["write_report"]


def _save(ax, path: Path) -> str:
    fig = ax.figure
    fig.tight_layout()
    fig.savefig(path, dpi=130)
    plt.close(fig)
    return path.name


def write_report(result: CalibrationResult, out: str | Path, *,
                 truth: dict[tuple[str, str], complex] | None = None) -> Path:
    """Write the report folder; returns the path of ``report.md``.

    ``truth`` (simulated devices only) adds the true residual |X + r| per pair.
    """
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    figs: list[tuple[str, str]] = []
    figs.append(("Crosstalk magnitude", _save(plot_matrix_db(result), out / "matrix_db.png")))
    figs.append(("Crosstalk phase", _save(plot_matrix_phase(result), out / "matrix_phase.png")))
    nulled = [p for p in result.pairs if p.accepted and p.nulled]
    leak = [p for p in nulled if p.method == "leakage"]
    for p in (leak or nulled)[:1] + sorted(nulled, key=lambda p: -abs(p.x))[:1]:
        sweep = result.sweeps[p.sweep_id]
        amp = sweep.attrs["aggressor_amplitude"]
        name = f"null_{p.aggressor}_{p.victim}.png"
        if any(f[1] == name for f in figs):
            continue
        ax = plot_null_landscape(sweep, p.victim, z_star=-p.x * amp, cov=p.x_cov * amp**2)
        figs.append((f"Null search {p.aggressor} → {p.victim} ({p.method})", _save(ax, out / name)))
    worst = None
    if truth:
        figs.append(("Residuals", _save(plot_residuals(result, truth), out / "residuals.png")))
        res = [20 * math.log10(abs(truth[(p.aggressor, p.victim)] - p.x)) for p in nulled]
        worst = max(res) if res else None
    (out / "matrix.json").write_text(dumps(result) + "\n")
    n_acc = sum(p.accepted for p in result.pairs)
    lines = [
        f"# Crosstalk calibration of {result.chip.name}",
        "",
        f"- rig: `{result.rig_description}`",
        f"- protocol: `{result.protocol.name}`; threshold {result.protocol.survey.threshold_db:g} dB",
        f"- pairs: {len(result.pairs)} ({n_acc} measured, {len(nulled)} nulled)",
        f"- shots: {result.shots:,}; rig time {result.rig_seconds:.1f} s",
    ]
    if worst is not None:
        lines.append(f"- worst true residual of a nulled pair: {worst:.1f} dB")
    lines += ["", "## Matrix", "", "```", format_table(result), "```", ""]
    for title, name in figs:
        lines += [f"## {title}", "", f"![{title}]({name})", ""]
    md = out / "report.md"
    md.write_text("\n".join(lines))
    body = []
    for ln in lines:
        if ln.startswith("!["):
            name = ln[ln.index("](") + 2 : -1]
            data = base64.b64encode((out / name).read_bytes()).decode()
            body.append(f'<img src="data:image/png;base64,{data}" style="max-width:100%">')
        elif ln.startswith("# "):
            body.append(f"<h1>{html.escape(ln[2:])}</h1>")
        elif ln.startswith("## "):
            body.append(f"<h2>{html.escape(ln[3:])}</h2>")
        elif ln.startswith("- "):
            body.append(f"<li>{html.escape(ln[2:])}</li>")
        elif ln != "```":
            body.append(html.escape(ln) + "<br>" if ln else "")
    table = html.escape(format_table(result))
    page = "\n".join(body).replace(html.escape(format_table(result).split("\n")[0]) + "<br>",
                                   "", 1)
    page = page.replace("<h2>Matrix</h2>", f"<h2>Matrix</h2><pre>{table}</pre>", 1)
    (out / "report.html").write_text(
        "<!doctype html><meta charset='utf-8'><title>xtalkcal report</title>"
        "<body style='font-family:sans-serif;max-width:900px;margin:auto'>" + page + "</body>")
    return md
