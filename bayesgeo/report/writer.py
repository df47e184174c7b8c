"""The report a reviewer reads: one self-contained HTML file built from a run folder.

:func:`build_report` reads the files a run wrote (:mod:`bayesgeo.study.runner`) and its manifest and
returns one HTML page: every image embedded as a base64 ``data:`` URI, formulas in plain HTML
and Unicode, a print style sheet, no script and no external resource, so the page works offline,
can be archived with a submission and prints well. The sections are in
:mod:`bayesgeo.report.sections`.
"""

from __future__ import annotations

import html
from collections.abc import Mapping
from pathlib import Path

from bayesgeo.common.io import write_text

__all__ = ["build_report", "write_report", "REPORT_CSS"]

REPORT_CSS = """
body{font-family:'DejaVu Sans',Arial,sans-serif;max-width:60rem;margin:1.5rem auto;padding:0 1rem;color:#111;
line-height:1.45;font-size:15px}
h1{font-size:1.7rem;margin-bottom:.2rem}h2{font-size:1.3rem;border-bottom:2px solid #345;padding-bottom:.15rem;
margin-top:2.2rem}h3{font-size:1.08rem;margin-top:1.4rem}
table{border-collapse:collapse;margin:.6rem 0;font-size:.86rem}th,td{border:1px solid #999;padding:.2rem .45rem;
text-align:right;vertical-align:top}th{background:#e8edf2}td.l,th.l{text-align:left}
figure{margin:.8rem 0;page-break-inside:avoid;break-inside:avoid}figure img{max-width:100%;height:auto;
border:1px solid #ccc}figcaption{font-size:.85rem;color:#333}
.banner{border:3px solid #b00;background:#fde8e8;color:#700;padding:.6rem .9rem;font-weight:bold;margin:1rem 0}
.ok{border:2px solid #2a6;background:#e9f6ee;padding:.5rem .9rem;margin:1rem 0}
.warn{border:2px solid #c80;background:#fff4dd;padding:.5rem .9rem;margin:1rem 0}
.gap{border:1px dashed #777;background:#f4f4f4;padding:.4rem .8rem;color:#333}
.formula{font-family:'DejaVu Serif',Georgia,serif;background:#f6f6f6;padding:.35rem .7rem;margin:.4rem 0;
display:block;white-space:pre-wrap}
code,pre{font-family:'DejaVu Sans Mono',monospace;font-size:.8rem}pre{background:#f6f6f6;padding:.5rem;
overflow-x:auto;white-space:pre-wrap;word-break:break-all}
nav ol{columns:2;font-size:.9rem}.small{font-size:.82rem;color:#333}
@media print{body{max-width:none;margin:0;font-size:11pt}nav{display:none}h2{page-break-before:auto;
break-after:avoid}table,figure,.banner{page-break-inside:avoid;break-inside:avoid}
a{color:inherit;text-decoration:none}pre{font-size:7.5pt}@page{size:A4;margin:16mm 14mm}}
"""


def build_report(root: str | Path, manifest: Mapping, *, out_name: str | None = None) -> str:
    """The HTML text of the report of the run folder ``root``.

    Parameters
    ----------
    root : path
        Run folder (possibly still under its temporary name).
    manifest : mapping
        The run's manifest (:mod:`bayesgeo.study.manifest`), with stages and verdicts filled in.
    out_name : str, optional
        The folder's final name, shown in the report (default ``root``).

    Returns
    -------
    str
        A complete HTML5 document with no external references.
    """
    from bayesgeo.report import sections as rs
    ctx = rs.context(Path(root), manifest, out_name=out_name or str(root))
    parts = [rs.header(ctx), rs.contents(ctx)]
    for section in rs.SECTIONS:
        parts.append(section(ctx))
    title = html.escape(ctx.title)
    body = "\n".join(parts)
    return ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            f"<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n<title>{title}</title>\n"
            f"<style>{REPORT_CSS}</style>\n</head>\n<body>\n{body}\n</body>\n</html>\n")


def write_report(root: str | Path, manifest: Mapping, *, out_name: str | None = None,
                 filename: str = "report.html", overwrite: bool = False) -> Path:
    """Build the report of ``root`` and write it atomically as ``root/filename``."""
    text = build_report(root, manifest, out_name=out_name)
    return write_text(Path(root) / filename, text, overwrite=overwrite)
