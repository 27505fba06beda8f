"""A report folder a colleague opens: TOML for machines, CSV for spreadsheets, PNG
figures (matplotlib's Agg canvas, no GUI, no global pyplot state) and one
self-contained HTML page (figures embedded as data URIs, styles inline).

Every analysis command (range, design, survey, check, tune) writes through this,
so their pages look alike and their files are written the same safe way
(whole-file replace: a reader never sees half a file).

    rep = ReportFolder("out", "Detection range")
    rep.toml("range.toml", doc)
    rep.csv("points.csv", ["distance_m", "snr_db"], rows)
    fig, ax = figure()
    ...; rep.figure("snr.png", fig, "SNR against distance")
    rep.section("Chains", rep.table(["chain", "range"], [["A", "1.9 m"]]))
    rep.html("report.html")
"""

from __future__ import annotations

import base64
import csv
import html
import io
import math
import os
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

from livefilt import __version__
from livefilt.errors import RecordingError
from livefilt.safety import CAUTIONS

__all__ = ["ReportFolder", "figure", "esc"]

esc = html.escape


def figure(width_in: float = 7.0, height_in: float = 4.2, rows: int = 1, cols: int = 1, **kw):
    """A new matplotlib figure on the Agg canvas and its axes (no pyplot)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    fig = Figure(figsize=(width_in, height_in), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(rows, cols, **kw)
    return fig, axes


class ReportFolder:
    """Files of one report in ``folder`` (created, parents too)."""

    def __init__(self, folder: str | os.PathLike, title: str):
        self.folder = Path(folder)
        self.title = title
        self._sections: list[tuple[str, str]] = []
        self._figures: dict[str, tuple[bytes, str]] = {}
        self.written: list[Path] = []
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
        except FileExistsError:
            raise RecordingError(f"{self.folder}: is a file, not a folder: name a folder for the report") from None
        except OSError as e:
            raise RecordingError(f"{self.folder}: cannot create the report folder: {e.strerror}") from None
        if not os.access(self.folder, os.W_OK):
            raise RecordingError(f"{self.folder}: cannot write there (permission denied or read-only)")

    # -- files -----------------------------------------------------------------
    def _write(self, name: str, data: bytes) -> Path:
        path = self.folder / name
        tmp = path.with_name(f".{path.name}.tmp")
        try:
            with open(tmp, "wb") as f:
                f.write(data)
            os.replace(tmp, path)
        except OSError as e:
            try:
                tmp.unlink()
            except OSError:
                pass
            raise RecordingError(f"{path}: cannot write the report: {e.strerror}") from None
        if path not in self.written:
            self.written.append(path)
        return path

    def toml(self, name: str, doc: Mapping[str, Any]) -> Path:
        from livefilt.config import toml_text
        return self._write(name, toml_text(doc).encode())

    def csv(self, name: str, header: Sequence[str], rows: Iterable[Sequence[Any]]) -> Path:
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(header)
        for r in rows:
            w.writerow(["" if (isinstance(v, float) and math.isnan(v)) else
                        (repr(v) if isinstance(v, float) else v) for v in r])
        return self._write(name, buf.getvalue().encode())

    def figure(self, name: str, fig, caption: str = "", dpi: int = 110) -> Path:
        buf = io.BytesIO()
        fig.savefig(buf, format="png", dpi=dpi)
        data = buf.getvalue()
        self._figures[name] = (data, caption)
        return self._write(name, data)

    # -- page --------------------------------------------------------------------
    def section(self, heading: str, body_html: str) -> None:
        """Add a section; ``body_html`` is trusted HTML (escape user text with :func:`esc`)."""
        self._sections.append((heading, body_html))

    def img(self, name: str) -> str:
        """The figure ``name`` (already written) as an embedded image with its caption."""
        data, caption = self._figures[name]
        uri = "data:image/png;base64," + base64.b64encode(data).decode()
        cap = f"<figcaption>{esc(caption)}</figcaption>" if caption else ""
        return f'<figure><img alt="{esc(caption or name)}" src="{uri}">{cap}</figure>'

    @staticmethod
    def table(header: Sequence[str], rows: Iterable[Sequence[Any]]) -> str:
        head = "".join(f"<th>{esc(str(h))}</th>" for h in header)
        body = "".join("<tr>" + "".join(f"<td>{esc(str(v))}</td>" for v in r) + "</tr>" for r in rows)
        return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"

    @staticmethod
    def paragraphs(*texts: str) -> str:
        return "".join(f"<p>{esc(t)}</p>" for t in texts)

    def html(self, name: str = "report.html", subtitle: str = "") -> Path:
        now = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
        parts = [f"<h1>{esc(self.title)}</h1>",
                 f'<p class="meta">{esc(subtitle + " · " if subtitle else "")}'
                 f"livefilt {esc(__version__)} · written {now}</p>"]
        for heading, body in self._sections:
            parts.append(f"<section><h2>{esc(heading)}</h2>{body}</section>")
        parts.append('<section class="caution"><h2>Cautions</h2>'
                     + "".join(f"<p>{esc(c)}</p>" for c in CAUTIONS) + "</section>")
        page = (f"<!doctype html><html lang=\"en\"><head><meta charset=\"utf-8\">"
                f"<title>{esc(self.title)}</title><style>{_CSS}</style></head><body>"
                + "".join(parts) + "</body></html>")
        return self._write(name, page.encode())


_CSS = """
body{font:15px/1.45 system-ui,sans-serif;max-width:960px;margin:2em auto;padding:0 1em;color:#1d2430}
h1{font-size:1.6em;margin-bottom:.2em}h2{font-size:1.2em;border-bottom:1px solid #d8dde6;padding-bottom:.2em}
.meta{color:#5b6675;margin-top:0}table{border-collapse:collapse;margin:.6em 0}
th,td{border:1px solid #d8dde6;padding:.25em .6em;text-align:right}th{background:#eef2f7}
td:first-child,th:first-child{text-align:left}figure{margin:1em 0}img{max-width:100%}
figcaption{color:#5b6675;font-size:.9em}.caution{background:#fff6e5;border-left:4px solid #d98e04;padding:.2em 1em}
.warn{color:#a33b00;font-weight:600}
"""
