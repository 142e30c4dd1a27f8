"""A report folder: PNG figures, the matrix JSON, Markdown and a self-contained HTML page.

The Markdown is the report; the HTML page is that Markdown rendered by Python-Markdown (with
its ``tables`` and ``fenced_code`` extensions) and the figures embedded as data URIs, so the
page opens anywhere with no folder beside it. Sections follow the job: calibration,
settings, verification, gates, drift; then where the numbers come from and the drive limits.
"""

from __future__ import annotations

import base64
import datetime as dt
import html
import math
from pathlib import Path

import markdown
import matplotlib.pyplot as plt
import numpy as np

import xtalkcal.outputs.plot as plots
import xtalkcal.outputs.plot_results as result_plots
from xtalkcal.calibrate import CalibrationResult
from xtalkcal.common import atomic_write
from xtalkcal.hardware import limits_summary
from xtalkcal.outputs.export import dumps, format_table

__all__ = ["write_report", "render_html"]

# The report's matrix table lists at most this many pairs (the strongest); matrix.txt and
# matrix.json hold them all.
_TABLE_ROWS = 60

_STYLE = ("body{font-family:sans-serif;max-width:960px;margin:auto;padding:0 1em;"
          "line-height:1.4}pre{background:#f6f6f6;padding:.6em;overflow-x:auto;"
          "font-size:12px}table{border-collapse:collapse}td,th{border:1px solid #ccc;"
          "padding:2px 6px;text-align:left}img{max-width:100%}")


def _save(ax, path: Path) -> str:
    fig = ax.figure
    fig.tight_layout()
    fig.savefig(path, dpi=130)
    plt.close(fig)
    return path.name


def _figure(title: str, name: str) -> list[str]:
    return [f"### {title}", "", f"![{title}]({name})", ""]


def _code(text: str) -> list[str]:
    return ["```text", text, "```", ""]


def render_html(md_text: str, folder: Path, title: str) -> str:
    """The HTML page of a report's Markdown, its figures (files in ``folder``) embedded."""
    body = markdown.markdown(md_text, extensions=["tables", "fenced_code"],
                             output_format="html")
    for name in sorted({p.name for p in folder.glob("*.png")}):
        data = base64.b64encode((folder / name).read_bytes()).decode()
        body = body.replace(f'src="{name}"', f'src="data:image/png;base64,{data}"')
    return ("<!doctype html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{html.escape(title)}</title><style>{_STYLE}</style></head>\n"
            f"<body>\n{body}\n</body></html>\n")


def write_report(result: CalibrationResult, out: str | Path, *,
                 truth: dict[tuple[str, str], complex] | None = None,
                 campaign=None, about: list[str] | None = None, played=None,
                 figures: list[tuple[str, str, object]] | None = None) -> Path:
    """Write the report folder; returns the path of ``report.md``.

    ``truth`` (simulated devices only) adds the true residual per pair; ``campaign`` (a
    :class:`xtalkcal.campaign.CampaignResult`) adds settings, verification, gate errors and
    the drift watch; ``about`` adds lines on where the numbers come from; ``played``
    (residuals of :func:`xtalkcal.outputs.verify_settings`) adds the verification of the
    written settings as the control stack plays them; ``figures`` adds (title, file name,
    Axes) figures made by the caller, at the end of the calibration section.
    """
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    chip = result.chip
    lines = [f"# Crosstalk calibration of {chip.name}", ""]
    lines += _calibration_section(result, out, truth, campaign, about, figures)
    played = played or (getattr(campaign, "played", None) if campaign is not None else None)
    if campaign is not None:
        lines += _settings_section(campaign)
    if (campaign is not None and campaign.verification) or played:
        lines += _verification_section(campaign, out, truth, played)
    if campaign is not None and campaign.rb is not None:
        lines += _gates_section(campaign, out)
    if campaign is not None and campaign.drift:
        lines += _drift_section(campaign, out)
    lines += _provenance_section(result)
    atomic_write(out / "matrix.json", dumps(result) + "\n")
    md_text = "\n".join(lines)
    md = out / "report.md"
    atomic_write(md, md_text)
    atomic_write(out / "report.html",
                render_html(md_text, out, f"xtalkcal report: {chip.name}"))
    return md


def _calibration_section(result, out, truth, campaign, about, figures) -> list[str]:
    nulled = [p for p in result.pairs if p.accepted and p.nulled]
    n_acc = sum(p.accepted for p in result.pairs)
    lines = [
        "## Calibration", "",
        f"- rig: `{result.rig_description}`",
        f"- protocol: `{result.protocol.name}`; survey threshold "
        f"{result.protocol.survey.threshold_db:g} dB, target residual "
        f"{result.protocol.null.target_residual_db:g} dB",
        f"- pairs: {len(result.pairs)} ({n_acc} measured, {len(nulled)} nulled)",
        f"- calibration: {result.shots:,} shots"
        + (f", {result.rig_seconds:.1f} s of rig time" if math.isfinite(result.rig_seconds)
           else ""),
    ]
    lines += [f"- {a}" for a in about or ()]
    if campaign is not None and campaign.shots:
        lines.append("- shots by step: " + ", ".join(f"{k} {v:,}"
                                                     for k, v in campaign.shots.items()))
    if truth and nulled:
        res = [20 * math.log10(max(abs(truth[(p.aggressor, p.victim)] - p.x), 1e-15))
               for p in nulled]
        lines.append(f"- worst true residual of a nulled pair (simulator's truth): "
                     f"{max(res):.1f} dB")
    atomic_write(out / "matrix.txt", format_table(result) + "\n")
    many = len(result.pairs) > _TABLE_ROWS
    lines += ["", "### Matrix" + (f" (the {_TABLE_ROWS} strongest pairs)" if many else ""), ""]
    lines += _code(format_table(result, limit=_TABLE_ROWS if many else None))
    lines += _figure("Crosstalk magnitude",
                     _save(plots.plot_matrix_db(result), out / "matrix_db.png"))
    lines += _figure("Crosstalk phase",
                     _save(plots.plot_matrix_phase(result), out / "matrix_phase.png"))
    leak = [p for p in nulled if p.method == "leakage"]
    shown: set[str] = set()
    for p in (leak or nulled)[:1] + sorted(nulled, key=lambda p: -abs(p.x))[:1]:
        name = f"null_{p.aggressor}_{p.victim}.png"
        if name in shown:
            continue
        shown.add(name)
        sweep = result.sweeps.get(p.sweep_id)
        if sweep is None:
            continue  # a result rebuilt without its sweeps: no landscape to draw
        amp = sweep.attrs["aggressor_amplitude"]
        ax = plots.plot_null_landscape(sweep, p.victim, z_star=-p.x * amp,
                                       cov=p.x_cov * amp**2, chip=result.chip.name)
        lines += _figure(f"Null search {p.aggressor} → {p.victim} ({p.method})",
                         _save(ax, out / name))
    if truth:
        after = getattr(campaign, "all_on_pair_db", None) or None
        label = ("after: true field, every tone of the written settings on" if after
                 else "after: |X + r| (true), r = −X measured")
        ax = result_plots.plot_residuals(result, truth, after_db=after, after_label=label)
        lines += _figure("Residuals", _save(ax, out / "residuals.png"))
    for title, name, ax in figures or ():
        if ax is not None:
            lines += _figure(title, _save(ax, out / name))
    return lines


def _settings_section(campaign) -> list[str]:
    lines = ["## Settings", ""]
    ref = getattr(campaign, "refinement", None)
    if ref is not None and ref.results:
        lines.append(f"- closed-loop refinement: {len(ref.results)} round(s), largest setting "
                     "move " + ", ".join(f"{m:.1f} σ" for m in ref.moves)
                     + ("; converged" if ref.converged else "; stopped at the round limit"))
    if campaign.all_on_db:
        lines.append("- worst true field at a victim with all of its aggressor's tones on "
                     "(simulator's truth): " + ", ".join(f"{k} {v:.1f} dB"
                                                         for k, v in campaign.all_on_db.items()))
    lines += [f"- {note}" for note in getattr(campaign, "settings_notes", None) or ()]
    n = len(campaign.settings.pairs) if getattr(campaign, "settings", None) else 0
    lines += [f"- {n} cancellation settings written (settings.json, settings.csv)", ""]
    return lines


def _verification_section(campaign, out, truth, played) -> list[str]:
    lines = ["## Verification", ""]
    if campaign is not None and campaign.verification:
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
        n_in = sum(c.outcome.decision.value == "within" for c in campaign.verification)
        n_sure = sum(c.outcome.decision.value == "within" and c.outcome.confident
                     for c in campaign.verification)
        worst = max(campaign.verification, key=lambda c: c.outcome.residual_upper_db)
        lines += [
            f"- verification (each pair's residual |X − X_stored| re-measured with all tones "
            f"on, the known leaks of the other tones taken out): {n_in} of "
            f"{len(campaign.verification)} compensated pairs within {campaign.tolerance_db:g} dB"
            f" ({n_sure} beyond doubt); the least certain is {worst.aggressor} → "
            f"{worst.victim}, {worst.outcome.residual_db:.1f} dB with an upper bound of "
            f"{worst.outcome.residual_upper_db:.1f} dB", ""]
        ax = result_plots.plot_verification(campaign.verification, campaign.calibration,
                                            truth=true_after)
        lines += _figure("Verification", _save(ax, out / "verification.png"))
    if played:
        n_in = sum(r.within for r in played)
        lines += ["### Verification of the written settings, played as the control stack "
                  "plays them", "",
                  f"Each pair re-nulled with the settings played by the applicator: the "
                  f"residual w = X + r + Σ X_ik·r_k as measured, ± its standard error. "
                  f"{n_in} of {len(played)} pairs within {played[0].tolerance_db:g} dB "
                  f"beyond doubt (99 % bound).", ""]
        lines += _code("\n".join(r.line() for r in played))
    return lines


def _gates_section(campaign, out) -> list[str]:
    lines = ["## Simultaneous randomized benchmarking", ""]
    if campaign.trims:
        lines += ["Own drive of each qubit with compensation on (the cancellation tones at "
                  "its frequency reach it too), measured by amplitude amplification and "
                  "divided out before benchmarking: "
                  + ", ".join(f"{q} {100 * t.change:+.2f} % ± {100 * t.stderr:.2f} %"
                              for q, t in campaign.trims.items()) + ".", ""]
    lines += _code(campaign.rb.table())
    ax = result_plots.plot_gate_errors(campaign.rb, chip=campaign.calibration.chip.name)
    return lines + _figure("Gate errors", _save(ax, out / "gate_errors.png"))


def _drift_section(campaign, out) -> list[str]:
    acts = ", ".join(f"{v} {k}" for k, v in campaign.drift_actions.items())
    line = f"- drift watch: {acts}"
    tr = [s.true_residual_db for s in campaign.drift if s.true_residual_db is not None]
    if tr:
        within = np.mean(np.array(tr) <= campaign.tolerance_db)
        line += (f"; true residual within tolerance {100 * within:.1f} % of (pair, time) "
                 f"samples (simulator's truth)")
    axes = result_plots.plot_drift(campaign.drift, campaign.tolerance_db,
                                   chip=campaign.calibration.chip.name)
    return ["## Drift watch", "", line, ""] + _figure("Drift watch",
                                                      _save(axes[0], out / "drift.png"))


def _provenance_section(result: CalibrationResult) -> list[str]:
    chip = result.chip
    now = dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    lines = ["## About this report", "",
             f"- written: {now}",
             f"- protocol file: `{result.protocol.source}`",
             f"- chip file: `{chip.source}`", "",
             "## Drive limits in force", "", "- " + limits_summary(chip)]
    lines += [f"- line {ln.name} ({ln.qubit}): peak ≤ {chip.amplitude_limit(ln.name):g}"
              + (f", full scale {ln.full_scale_dbm:g} dBm" if ln.full_scale_dbm is not None
                 else "") for ln in chip.lines]
    return lines + [""]
