"""A report folder: PNG figures, the matrix JSON, Markdown and a self-contained HTML page."""

from __future__ import annotations

import base64
import html
import math
from pathlib import Path

import matplotlib.pyplot as plt
import numpy as np

import xtalkcal.outputs.plot as plots
from xtalkcal.calibrate import CalibrationResult
from xtalkcal.hardware import limits_summary
from xtalkcal.outputs.export import dumps, format_table

__all__ = ["write_report"]


def _save(ax, path: Path) -> str:
    fig = ax.figure
    fig.tight_layout()
    fig.savefig(path, dpi=130)
    plt.close(fig)
    return path.name


def write_report(result: CalibrationResult, out: str | Path, *,
                 truth: dict[tuple[str, str], complex] | None = None,
                 campaign=None, about: list[str] | None = None, played=None,
                 figures: list[tuple[str, str, object]] | None = None) -> Path:
    """Write the report folder; returns the path of ``report.md``.

    ``truth`` (simulated devices only) adds the true residual |X + r| per pair;
    ``campaign`` (a :class:`xtalkcal.campaign.CampaignResult`) adds verification,
    gate errors and the drift watch; ``about`` adds lines to the summary (where the
    numbers come from); ``played`` (residuals of :func:`xtalkcal.outputs.verify_settings`)
    adds the verification of the written settings as the control stack plays them;
    ``figures`` adds (title, file name, Axes) figures made by the caller.
    """
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    figs: list[tuple[str, str]] = []
    figs.append(("Crosstalk magnitude", _save(plots.plot_matrix_db(result), out / "matrix_db.png")))
    figs.append(("Crosstalk phase",
                 _save(plots.plot_matrix_phase(result), out / "matrix_phase.png")))
    nulled = [p for p in result.pairs if p.accepted and p.nulled]
    leak = [p for p in nulled if p.method == "leakage"]
    for p in (leak or nulled)[:1] + sorted(nulled, key=lambda p: -abs(p.x))[:1]:
        sweep = result.sweeps[p.sweep_id]
        amp = sweep.attrs["aggressor_amplitude"]
        name = f"null_{p.aggressor}_{p.victim}.png"
        if any(f[1] == name for f in figs):
            continue
        ax = plots.plot_null_landscape(sweep, p.victim, z_star=-p.x * amp, cov=p.x_cov * amp**2)
        figs.append((f"Null search {p.aggressor} → {p.victim} ({p.method})", _save(ax, out / name)))
    worst = None
    if truth:
        ax = plots.plot_residuals(result, truth)
        figs.append(("Residuals", _save(ax, out / "residuals.png")))
        res = [20 * math.log10(abs(truth[(p.aggressor, p.victim)] - p.x)) for p in nulled]
        worst = max(res) if res else None
    for title, name, ax in figures or ():
        if ax is not None:
            figs.append((title, _save(ax, out / name)))
    extra: list[str] = []
    if campaign is not None:
        extra += _campaign_sections(campaign, out, figs, truth)
    (out / "matrix.json").write_text(dumps(result) + "\n")
    n_acc = sum(p.accepted for p in result.pairs)
    lines = [
        f"# Crosstalk calibration of {result.chip.name}",
        "",
        f"- rig: `{result.rig_description}`",
        f"- protocol: `{result.protocol.name}`; "
        f"threshold {result.protocol.survey.threshold_db:g} dB",
        f"- pairs: {len(result.pairs)} ({n_acc} measured, {len(nulled)} nulled)",
        f"- calibration: {result.shots:,} shots"
        + (f", {result.rig_seconds:.1f} s of rig time" if math.isfinite(result.rig_seconds)
           else ""),
    ]
    lines += [f"- {a}" for a in about or ()]
    if worst is not None:
        lines.append(f"- worst true residual of a nulled pair: {worst:.1f} dB")
    lines += extra
    played = played or (getattr(campaign, "played", None) if campaign is not None else None)
    for note in getattr(campaign, "settings_notes", None) or ():
        lines.append(f"- settings: {note}")
    if played:
        lines += _played_section(played)
    lines += ["", "## Drive limits in force", "", "- " + limits_summary(result.chip)]
    lines += [f"- line {ln.name} ({ln.qubit}): peak ≤ {result.chip.amplitude_limit(ln.name):g}"
              + (f", full scale {ln.full_scale_dbm:g} dBm" if ln.full_scale_dbm is not None
                 else "") for ln in result.chip.lines]
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


def _campaign_sections(campaign, out: Path, figs: list[tuple[str, str]], truth) -> list[str]:
    """Summary lines for the verification, benchmarking and drift parts (adds figures)."""
    lines: list[str] = []
    if campaign.verification:
        true_after = None
        if getattr(campaign, "all_on_pair_db", None):
            # the true field with every tone of the settings on (what they are for)
            true_after = dict(campaign.all_on_pair_db)
        elif truth:
            settings = {(p.aggressor_line, p.victim): p.ratio for p in campaign.settings.pairs}
            true_after = {}
            for c in campaign.verification:
                r = settings.get((c.aggressor, c.victim))
                if r is not None:
                    true_after[(c.aggressor, c.victim)] = 20 * math.log10(
                        max(abs(truth[(c.aggressor, c.victim)] + r), 1e-12))
        ax = plots.plot_verification(campaign.verification, campaign.calibration,
                                     truth=true_after)
        figs.append(("Verification", _save(ax, out / "verification.png")))
        n_in = sum(c.outcome.decision.value == "within" for c in campaign.verification)
        n_sure = sum(c.outcome.decision.value == "within" and c.outcome.confident
                     for c in campaign.verification)
        worst = max(campaign.verification, key=lambda c: c.outcome.residual_upper_db)
        lines.append(
            f"- verification (each pair's residual |X − X_stored| re-measured with all tones "
            f"on, the known leaks of the other tones taken out): {n_in} of "
            f"{len(campaign.verification)} compensated pairs within {campaign.tolerance_db:g} dB"
            f" ({n_sure} beyond doubt); the least certain is {worst.aggressor} → "
            f"{worst.victim}, {worst.outcome.residual_db:.1f} dB with an upper bound of "
            f"{worst.outcome.residual_upper_db:.1f} dB")
    if campaign.rb is not None:
        ax = plots.plot_gate_errors(campaign.rb)
        figs.append(("Gate errors", _save(ax, out / "gate_errors.png")))
        lines += ["", "## Simultaneous randomized benchmarking", ""]
        if campaign.trims:
            lines += ["Own drive of each qubit with compensation on (the cancellation tones "
                      "at its frequency reach it too), measured by amplitude amplification "
                      "and divided out before benchmarking: "
                      + ", ".join(f"{q} {100 * t.change:+.2f} % ± {100 * t.stderr:.2f} %"
                                  for q, t in campaign.trims.items()) + ".", ""]
        lines += ["```", campaign.rb.table(), "```"]
    if campaign.drift:
        axes = plots.plot_drift(campaign.drift, campaign.tolerance_db)
        figs.append(("Drift watch", _save(axes[0], out / "drift.png")))
        tr = [s.true_residual_db for s in campaign.drift if s.true_residual_db is not None]
        acts = ", ".join(f"{v} {k}" for k, v in campaign.drift_actions.items())
        line = f"- drift watch: {acts}"
        if tr:
            within = np.mean(np.array(tr) <= campaign.tolerance_db)
            line += (f"; true residual within tolerance {100 * within:.1f} % of "
                     f"(pair, time) samples")
        lines.insert(0, line)
    ref = getattr(campaign, "refinement", None)
    if ref is not None and ref.results:
        line = (f"- closed-loop refinement: {len(ref.results)} round(s), largest setting move "
                + ", ".join(f"{m:.1f} σ" for m in ref.moves)
                + ("; converged" if ref.converged else "; stopped at the round limit"))
        if campaign.all_on_db:
            line += ("; worst true field at a victim with all of its aggressor's tones on: "
                     + ", ".join(f"{k} {v:.1f} dB" for k, v in campaign.all_on_db.items()))
        lines.insert(0, line)
    if campaign.shots:
        lines.insert(0, "- shots by step: " + ", ".join(f"{k} {v:,}"
                                                       for k, v in campaign.shots.items()))
    return lines


def _played_section(played) -> list[str]:
    """The written settings played as the control stack plays them: each pair's residual."""
    n_in = sum(r.within for r in played)
    tol = played[0].tolerance_db
    return ["", "## Verification of the written settings", "",
            f"Each pair re-nulled with the settings played by the applicator: the residual "
            f"w = X + r + Σ X_ik·r_k as measured, ± its standard error. {n_in} of "
            f"{len(played)} pairs within {tol:g} dB beyond doubt (99 % bound).", "", "```"]\
        + [r.line() for r in played] + ["```"]
