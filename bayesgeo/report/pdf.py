"""The report as a PDF for paper and for a regulator's file: WeasyPrint renders the same HTML, no browser.

:func:`write_pdf` renders ``report.html``'s text with the print style sheet of
:data:`bayesgeo.report.writer.REPORT_CSS` (A4, page numbers "page N of M" at the foot, headings kept
with what follows, figures not split, long tables split between rows with their header repeated, small
table type, figures at most half a page high so that two share a page) into ``report.pdf``, atomically. WeasyPrint needs the Pango text libraries of the operating
system; where it or they are missing the PDF is skipped with a one-line reason and the HTML stays the
report (the HTML is always written first).
"""

from __future__ import annotations

from pathlib import Path

from bayesgeo.common.io import atomic_file

__all__ = ["PDF_CSS", "pdf_renderer", "write_pdf"]

#: Print rules added for the PDF (WeasyPrint reads @page margin boxes; browsers ignore them).
PDF_CSS = """
@page{size:A4;margin:16mm 14mm 18mm 14mm;
@bottom-right{content:"page " counter(page) " of " counter(pages);font-size:8pt;color:#555}
@bottom-left{content:string(title);font-size:8pt;color:#555}}
h1{string-set:title content()}
body{max-width:none;margin:0;font-size:10pt}nav{display:none}
h2,h3,h4{break-after:avoid}figure,.banner,.ok,.warn{break-inside:avoid}table{break-inside:auto}
tr{break-inside:avoid}
figure img{max-height:120mm;width:auto;max-width:100%}a{color:inherit;text-decoration:none}pre{font-size:7.5pt}
table{font-size:7pt}th,td{padding:1pt 3pt}td{white-space:nowrap}
"""


def pdf_renderer():
    """WeasyPrint's ``HTML`` class, or the one-line reason it cannot be used here."""
    try:
        from weasyprint import HTML
    except ImportError:
        return None, "WeasyPrint is not installed (pip install 'bayesgeo[pdf]')"
    except OSError as err:  # the Pango libraries of the operating system are missing
        return None, f"WeasyPrint cannot load the system's text libraries ({' '.join(str(err).split())[:120]})"
    return HTML, ""


def write_pdf(html_text: str, path: str | Path, *, overwrite: bool = False) -> tuple[Path | None, str]:
    """Render ``html_text`` to the PDF ``path`` (atomically). Returns ``(path, "")`` or ``(None, reason)``."""
    renderer, reason = pdf_renderer()
    if renderer is None:
        return None, reason
    # after the page's own style sheet, so that these rules win the cascade (a user style sheet would lose)
    text = html_text.replace("</head>", f"<style>{PDF_CSS}</style>\n</head>", 1)
    path = Path(path)
    with atomic_file(path, overwrite=overwrite) as tmp:
        renderer(string=text, base_url=str(path.parent)).write_pdf(tmp)
    return path, ""
