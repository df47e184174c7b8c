"""Figures and the self-contained HTML page of a validation (SBC) run.

The page embeds its figures as base64 PNG, lists every configuration with its rank-uniformity
test and interval coverage against binomial bounds, the fits that failed the convergence check,
and the cautions that go with any software validation.
"""

from __future__ import annotations

import base64
import html
import io

import numpy as np
import xarray as xr

__all__ = ["CAUTIONS", "rank_figure", "coverage_figure", "validation_html"]

#: Cautions printed on every validation page and in the JSON.
CAUTIONS = [
    "Simulation-based calibration shows that the software fits its own model correctly on this layout; "
    "it does not show that the model suits a site's data. Check the model against the data "
    "(bayesgeo check, compare, variogram-check) before relying on any fit.",
    "Results that feed contamination or exposure decisions must follow the local regulator's rules and "
    "the judgement of a licensed professional; this report supports, never replaces, that judgement.",
    "Counts are random: with the 0.1% two-sided binomial bounds used here, a calibrated model fails one "
    "of a few hundred checks by chance.",
]


def _png(fig) -> str:
    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90, bbox_inches="tight")
    plt.close(fig)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def rank_figure(result: xr.Dataset, summary: dict):
    """Rank histograms, one panel per quantity, with the 99% band of each bin's count (grey)."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    qs = list(summary["quantities"])
    fig, axes = plt.subplots(1, len(qs), figsize=(3.0 * len(qs), 2.6), squeeze=False)
    for ax, q in zip(axes[0], qs):
        u = summary["quantities"][q]["uniformity"]
        b = u["bins"]
        ax.axhspan(u["band"][0], u["band"][1], color="#d9d9d9", zorder=0)
        ax.axhline(u["n"] / b, color="#636363", lw=1)
        ax.bar(np.arange(b), u["counts"], width=0.9, color="#3182bd", zorder=2)
        p = u["pvalue"]
        ax.set_title(f"{q}\nchi-square p = {p:.3g}" if p is not None else q, fontsize=9)
        ax.set_xlabel(f"rank bin (L = {summary['ranks_of']})", fontsize=8)
        ax.tick_params(labelsize=7)
    axes[0][0].set_ylabel("replicates")
    fig.suptitle(summary["model"], fontsize=10)
    fig.tight_layout()
    return fig


def coverage_figure(summary: dict):
    """Observed coverage of the 50% and 90% central intervals with the binomial bounds (bars)."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    qs = list(summary["quantities"])
    fig, ax = plt.subplots(figsize=(1.2 + 1.1 * len(qs), 2.8))
    for k, (lev, colour) in enumerate((("0.5", "#e6550d"), ("0.9", "#31a354"))):
        for i, q in enumerate(qs):
            c = summary["quantities"][q]["coverage"][lev]
            x = i + (k - 0.5) * 0.25
            ax.plot([x, x], [c["bounds"][0] / c["of"], c["bounds"][1] / c["of"]], color=colour, lw=4, alpha=0.35)
            ax.plot(x, c["count"] / c["of"], "o", color=colour, label=f"{float(lev):.0%} interval" if i == 0 else None)
        ax.axhline(float(lev), color=colour, lw=0.8, ls="--")
    ax.set_xticks(range(len(qs)), qs, rotation=20, fontsize=8)
    ax.set_ylim(0, 1.02)
    ax.set_ylabel("share of replicates covered")
    ax.legend(frameon=False, fontsize=8, loc="lower right")
    ax.set_title(f"{summary['model']}: coverage (bars: binomial bounds)", fontsize=9)
    fig.tight_layout()
    return fig


def _table(summary: dict) -> str:
    rows = ["<tr><th>quantity</th><th>rank test p</th><th>50% covered</th><th>90% covered</th>"
            "<th>90% among converged</th><th>verdict</th></tr>"]
    for q, e in summary["quantities"].items():
        c5, c9 = e["coverage"]["0.5"], e["coverage"]["0.9"]
        cc = e["coverage_converged"].get("0.9")
        ok = e["uniform_ok"] and c5["ok"] and c9["ok"]
        p = e["uniformity"]["pvalue"]
        rows.append(
            f"<tr><td>{html.escape(q)}</td><td>{'-' if p is None else f'{p:.3g}'}</td>"
            f"<td>{c5['count']}/{c5['of']} [{c5['bounds'][0]}, {c5['bounds'][1]}]</td>"
            f"<td>{c9['count']}/{c9['of']} [{c9['bounds'][0]}, {c9['bounds'][1]}]</td>"
            f"<td>{'-' if cc is None else str(cc['count']) + '/' + str(cc['of'])}</td>"
            f"<td class={'ok' if ok else 'bad'}>{'pass' if ok else 'FAIL'}</td></tr>")
    return "<table>" + "".join(rows) + "</table>"


def _failed_checks_text(summary: dict, *, top: int = 6) -> str:
    """' Checks failed most often: rhat[sd_z] (3 fits), ...' or '' when none is recorded."""
    counts = summary.get("failed_checks") or {}
    if not counts:
        return ""
    shown = ", ".join(f"{html.escape(k)} ({v} fit{'s' if v != 1 else ''})" for k, v in list(counts.items())[:top])
    return f" Checks failed most often: {shown}."


def validation_html(runs: list[tuple[xr.Dataset, dict]], *, meta: dict) -> str:
    """The self-contained HTML page for ``runs`` (pairs of SBC result and :func:`sbc_summary`)."""
    parts = [
        "<!DOCTYPE html><html><head><meta charset='utf-8'><title>bayesgeo validation</title><style>"
        "body{font-family:sans-serif;max-width:70em;margin:1em auto;color:#222}"
        "table{border-collapse:collapse;margin:0.5em 0}td,th{border:1px solid #bbb;padding:2px 8px;font-size:90%}"
        ".ok{color:#1a7f37}.bad{color:#b42318;font-weight:bold}.caution{background:#fff5e6;padding:0.5em 1em}"
        "</style></head><body>",
        "<h1>bayesgeo software validation: simulation-based calibration</h1>",
        "<div class=caution><b>Cautions</b><ul>" + "".join(f"<li>{html.escape(c)}</li>" for c in CAUTIONS)
        + "</ul></div>",
        "<h2>Method</h2><p>For each replicate, parameters are drawn from the model's own prior, data are "
        "simulated on the layout, the model is fitted with NUTS (nutpie) and the rank of each true value "
        "among L thinned posterior draws is recorded (Talts, Betancourt, Simpson, Vehtari and Gelman 2018). "
        "For a correct fit the ranks are uniform on 0..L; the chi-square test of equal bins "
        "(scipy.stats.chisquare) and the grey bands (0.5%-99.5% binomial quantiles of each bin's count) "
        "check that. Central 50% and 90% intervals must cover the truth in a number of replicates inside "
        "the central 99.9% interval of Binomial(N, 0.5) and Binomial(N, 0.9). Fits that fail the "
        "convergence check are kept and flagged.</p>",
        "<h2>Run</h2><table>" + "".join(f"<tr><th>{html.escape(str(k))}</th><td>{html.escape(str(v))}</td></tr>"
                                          for k, v in meta.items()) + "</table>",
    ]
    for result, summary in runs:
        failed = summary["failed_fits"]
        parts += [
            f"<h2>{html.escape(summary['model'])}</h2>",
            f"<p>{summary['replicates']} replicates, {result.attrs.get('n')} points, L = {summary['ranks_of']}; "
            f"overall: <span class={'ok' if summary['ok'] else 'bad'}>{'pass' if summary['ok'] else 'FAIL'}</span>. "
            f"Fits failing the convergence check: {len(failed)}"
            + (f" (replicates {', '.join(map(str, failed))})" if failed else "") + "."
            + _failed_checks_text(summary) + "</p>",
            _table(summary),
            f"<img alt='rank histograms' src='data:image/png;base64,{_png(rank_figure(result, summary))}'>",
            f"<img alt='coverage' src='data:image/png;base64,{_png(coverage_figure(summary))}'>",
        ]
    parts.append("</body></html>")
    return "\n".join(parts)
