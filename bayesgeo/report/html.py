"""The report's run context and HTML pieces, shared by the report's sections (:mod:`bayesgeo.report.sections`,
:mod:`bayesgeo.report.sites`)."""

from __future__ import annotations

import base64
import html
import io
import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from bayesgeo.common.layout import RUN_INPUTS

__all__ = ["Fam", "Ctx", "read_json", "run_data", "esc", "fmt", "html_table", "img_tag", "fig_png", "gap", "section"]


@dataclass
class Fam:
    """What one fitted family left in the run folder."""

    name: str
    folder: Path
    report: dict | None = None
    diagnostics: dict | None = None
    tree: object | None = None
    error: str | None = None


@dataclass
class Ctx:
    root: Path
    manifest: Mapping
    out_name: str
    title: str
    settings: Mapping
    fams: list[Fam] = field(default_factory=list)
    not_converged: bool = False
    failed: list[str] = field(default_factory=list)
    several: bool = False
    sites: list[str] = field(default_factory=list)


def read_json(path: Path) -> dict | None:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None



def esc(x) -> str:
    return html.escape(str(x))


def fmt(v, digits: int = 4) -> str:
    if v is None:
        return "–"
    if isinstance(v, (bool, np.bool_)):
        return "yes" if v else "no"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        return "–" if not math.isfinite(v) else f"{v:.{digits}g}"
    return esc(v)


def html_table(rows: Sequence[Mapping], columns: Sequence[str], *, headers: Sequence[str] | None = None,
               left: Sequence[str] = ()) -> str:
    """An HTML table of ``rows`` (dicts) with the given columns; ``left`` columns left-aligned."""
    heads = headers or columns
    out = ["<table><thead><tr>"]
    out += [f"<th class=\"{'l' if c in left else ''}\">{esc(h)}</th>" for c, h in zip(columns, heads)]
    out.append("</tr></thead><tbody>")
    for r in rows:
        out.append("<tr>" + "".join(f"<td class=\"{'l' if c in left else ''}\">{fmt(r.get(c))}</td>"
                                    for c in columns) + "</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def img_tag(png: bytes | Path, alt: str, caption: str = "") -> str:
    """A figure with the PNG embedded as a base64 data URI."""
    data = png.read_bytes() if isinstance(png, Path) else png
    b64 = base64.b64encode(data).decode("ascii")
    cap = f"<figcaption>{esc(caption)}</figcaption>" if caption else ""
    return f"<figure><img alt=\"{esc(alt)}\" src=\"data:image/png;base64,{b64}\">{cap}</figure>"


def fig_png(fig) -> bytes:
    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    plt.close(fig)
    return buf.getvalue()


def gap(text: str) -> str:
    return f"<p class=\"gap\">{esc(text)}</p>"


def section(anchor: str, title: str, body: str) -> str:
    return f"<section id=\"{anchor}\"><h2>{esc(title)}</h2>\n{body}\n</section>"


def run_data(ctx: Ctx):
    from bayesgeo.data.points import read_points, read_settings

    d = ctx.settings.get("data", {})
    path = Path(d["path"])
    if not path.is_file() and (ctx.root / RUN_INPUTS / path.name).is_file():
        path = ctx.root / RUN_INPUTS / path.name  # the run's copy (the original may have been a scratch file)
    return read_points(path, **read_settings(d))
