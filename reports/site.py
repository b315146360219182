"""The site quality report, ``qc_report.pdf``, drawn from the site's written outputs only.

The report reads ``intervals.parquet``, ``daily.parquet`` and ``summary.json`` in the site's
output folder and writes ``qc_report.pdf`` next to them, atomically (a temporary file in the
same folder, then :func:`os.replace`). It always has the same pages in the same order
(:data:`PAGE_TITLES`); a page whose inputs are missing shows a note instead of its figure.
"""
from __future__ import annotations

from pathlib import Path

from matplotlib.backends.backend_pdf import PdfPages

from . import style
from ._data import read_site_outputs
from ._site_pages import CAUTION, PAGES, build_context

__all__ = ["write_site_report", "render_site_report", "PAGE_TITLES", "CAUTION"]

#: the pages of the site report, in order
PAGE_TITLES = tuple(title for title, _ in PAGES)


def render_site_report(site_dir: Path) -> list:
    """The report's pages as matplotlib Figures (nothing written)."""
    return _render(Path(site_dir))[0]


def _render(site_dir: Path):
    out = read_site_outputs(site_dir)
    ctx = build_context(out)
    figures = []
    with style.report_style():
        for title, builder in PAGES:
            try:
                fig = builder(ctx)
            except Exception as exc:  # one page must never sink the report; say what went wrong
                fig = style.new_page(title, header=ctx.header, footer=ctx.footer)
                ax = fig.add_axes([0.1, 0.3, 0.8, 0.4])
                style.note(ax, f"This page could not be drawn: {type(exc).__name__}: {exc}")
            figures.append(fig)
        style.number_pages(figures)
    return figures, ctx


def _write_pdf_atomically(path: Path, figures: list, *, title: str, subject: str) -> Path:
    """Render into memory, then write beside the target and rename (towerflow.atomic)."""
    import io

    from towerflow.atomic import atomic_write_bytes

    path = Path(path)
    buffer = io.BytesIO()
    with style.report_style():
        with PdfPages(buffer, metadata={"Title": title, "Subject": subject, "Creator": "towerflow"}) as pdf:
            for fig in figures:
                pdf.savefig(fig)
    atomic_write_bytes(path, buffer.getvalue())
    return path


def write_site_report(site_dir: Path) -> Path:
    """Render ``site_dir/qc_report.pdf`` from the outputs in ``site_dir``.

    Parameters
    ----------
    site_dir : Path
        The site's output folder (DIR/SITE_ID) holding ``intervals.parquet``,
        ``daily.parquet`` and ``summary.json``.

    Returns
    -------
    Path
        The written ``qc_report.pdf``. A missing input yields notes in the report, never an
        exception; an earlier report is replaced only once the new one is complete.
    """
    site_dir = Path(site_dir)
    figures, ctx = _render(site_dir)
    return _write_pdf_atomically(site_dir / "qc_report.pdf", figures,
                                 title=f"towerflow site quality report: {ctx.header}",
                                 subject="Quality control, energy-balance closure, gap filling and "
                                         "surface conductance of one flux-tower site")
