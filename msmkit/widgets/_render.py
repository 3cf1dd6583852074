"""Putting figures, tables and messages into widgets: one way, used by every panel.

Figures go into an ``ipywidgets.Output`` by setting the output list directly (one PNG
display item), never through ``plt.show()``: that path renders the same in JupyterLab,
Voila and nbclient and never waits on a front end.
"""
from __future__ import annotations

import base64
import html
import io

import numpy as np

from ..plots import figure_png

__all__ = ["MovingMarkerFigure", "clear", "encode_png", "frames", "message_html", "show_figure", "show_message",
           "show_png", "table_html"]

#: dots per inch of every PNG the widgets show: 1.5 screen pixels per point, so that a figure
#: scaled to the width of a wide window stays sharp (see PLOT_STYLE)
DPI = 144

#: figures fill the width of the panel (up to a readable size) instead of keeping their
#: pixel width; JupyterLab shrinks them in a narrow window
PLOT_STYLE = ("<style>.msmkit-plot .jp-RenderedImage img, .msmkit-plot .jp-OutputArea-output img"
              "{width:100%;max-width:1150px;height:auto}"
              ".msmkit-plot .jp-RenderedImage{width:100%}</style>")

#: compact rows for tables shown in an HTML widget
TABLE_STYLE = ("<style>.msmkit-table{border-collapse:collapse;font-size:90%}"
               ".msmkit-table td,.msmkit-table th{padding:1px 10px;line-height:1.3;text-align:right}"
               ".msmkit-table tbody tr:nth-child(odd){background:#f4f6f8}</style>")

_KINDS = {
    # kind: (border color, background, heading)
    "info": ("#0f5c8c", "#eef5fa", ""),
    "ok": ("#4d8b31", "#f0f7ec", ""),
    "warning": ("#b5851b", "#fcf6e8", "Warning"),
    "error": ("#c44536", "#fbeeec", "Could not do that"),
    "failed": ("#c44536", "#fbeeec", ""),  # a result that fails a test (not an error of use)
    "inconclusive": ("#6b7a8f", "#f1f3f6", ""),  # a test the data cannot decide: neither passed nor failed
}


def show_png(out, png: bytes, alt: str = "figure") -> None:
    """Replace whatever ``out`` (an Output widget) shows with one PNG image."""
    out.outputs = ({"output_type": "display_data",
                    "data": {"image/png": base64.b64encode(png).decode("ascii"), "text/plain": alt},
                    "metadata": {}},)


def show_figure(out, fig, alt: str = "figure") -> bytes:
    """Render a matplotlib Figure to PNG once and show it in ``out``; returns the PNG bytes.

    The figure is not registered with pyplot, so nothing needs closing; dropping the last
    reference frees it.
    """
    png = figure_png(fig, dpi=DPI)
    show_png(out, png, alt)
    return png


def clear(out) -> None:
    """Empty an Output widget."""
    out.outputs = ()


def message_html(lines, kind: str = "info") -> str:
    """A boxed message (``kind`` one of info, ok, warning, error, failed,
    inconclusive); ``lines`` is a string or a
    list of strings, shown escaped, one paragraph or bullet each."""
    if isinstance(lines, str):
        lines = [lines]
    lines = [str(x) for x in lines if str(x)]
    if not lines:
        return ""
    border, background, heading = _KINDS[kind]
    head = f"<b>{heading}:</b> " if heading else ""
    if len(lines) == 1:
        body = head + html.escape(lines[0])
    else:
        items = "".join(f"<li>{html.escape(x)}</li>" for x in lines)
        body = f"{head}<ul style='margin:2px 0 0 0; padding-left:18px'>{items}</ul>"
    return (f"<div class='msmkit-message msmkit-{kind}' style='border-left:4px solid {border}; "
            f"background:{background}; padding:4px 8px; margin:2px 0; line-height:1.35'>{body}</div>")


def show_message(widget, lines, kind: str = "info") -> None:
    """Show a message in an HTML widget (replacing what was there)."""
    widget.value = message_html(lines, kind)


def table_html(df, *, max_rows: int | None = None, formatters=None, caption: str = "") -> str:
    """A DataFrame as a compact HTML table (the first ``max_rows`` rows), with a caption."""
    shown = df if max_rows is None else df.head(max_rows)
    body = shown.to_html(index=False, border=0, classes="msmkit-table", formatters=formatters,
                         justify="right")
    cap = f"<div style='font-size:90%; color:#555; margin:2px 0'>{html.escape(caption)}</div>" if caption else ""
    return TABLE_STYLE + cap + body


def frames(n) -> str:
    """'1 frame', '5 frames'."""
    n = int(n)
    return f"{n} frame" if n == 1 else f"{n} frames"


def encode_png(rgba: np.ndarray, compress_level: int = 3) -> bytes:
    """PNG bytes of an (h, w, 4) uint8 image (alpha dropped; fast, moderate compression)."""
    from PIL import Image  # installed with matplotlib

    buf = io.BytesIO()
    Image.fromarray(np.ascontiguousarray(rgba[..., :3])).save(buf, format="png", compress_level=compress_level)
    return buf.getvalue()


class MovingMarkerFigure:
    """A figure drawn in full once, then re-encoded with only a few artists redrawn.

    Everything except ``moving`` is drawn once (layout included) and kept as a pixel
    background; :meth:`png` restores that background, draws the moving artists at their
    current state and encodes the pixels. Moving a marker therefore costs one small draw and
    a PNG encoding instead of a full layout and redraw.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    moving : list of Artist
        Artists that change between frames (drawn on top of the background).
    """

    def __init__(self, fig, moving):
        from matplotlib.backends.backend_agg import FigureCanvasAgg

        fig.set_dpi(DPI)
        self.figure = fig
        self.moving = list(moving)
        self._canvas = FigureCanvasAgg(fig)
        shown = [a.get_visible() for a in self.moving]
        for a in self.moving:
            a.set_visible(False)
        self._canvas.draw()
        self._background = self._canvas.copy_from_bbox(fig.bbox)
        for a, vis in zip(self.moving, shown):
            a.set_visible(vis)

    def png(self) -> bytes:
        """The figure as PNG bytes with the moving artists in their current state."""
        self._canvas.restore_region(self._background)
        for a in self.moving:
            self.figure.draw_artist(a)
        return encode_png(np.asarray(self._canvas.buffer_rgba()))
