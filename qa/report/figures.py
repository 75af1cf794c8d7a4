"""The house style of Lacuna's plots (matplotlib's object API; no global state)."""

from __future__ import annotations

from matplotlib.figure import Figure

#: Our palette: deep blue, rust, sage, sand, slate (never the only cue for meaning).
PALETTE = ("#1b4965", "#c8553d", "#588157", "#d4a373", "#5c677d")


def new_figure(width_in: float = 5.6, height_in: float = 2.8, *, ncols: int = 1):
    """A figure with ``ncols`` axes styled alike; returns (figure, axes or list of axes)."""
    fig = Figure(figsize=(width_in, height_in), dpi=150, layout="constrained")
    axes = [fig.add_subplot(1, ncols, i + 1) for i in range(ncols)]
    for ax in axes:
        ax.grid(True, color="0.88", lw=0.6)
        ax.set_axisbelow(True)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
        ax.tick_params(labelsize=7)
        ax.xaxis.label.set_size(8)
        ax.yaxis.label.set_size(8)
    return fig, (axes[0] if ncols == 1 else axes)


#: Resolution of the raster parts of a figure (images drawn with ``imshow``); lines and
#: text stay vectors.
IMAGE_DPI = 200


def figure_drawing(fig, width_mm: float):
    """A matplotlib Figure as a reportlab Drawing ``width_mm`` wide, kept as vectors.

    The figure goes through SVG (text as outlines, so the log needs no plot fonts) and
    svglib; images inside it are embedded at :data:`IMAGE_DPI`.
    """
    import io

    from reportlab.lib.units import mm
    from svglib.svglib import svg2rlg

    buf = io.BytesIO()
    fig.savefig(buf, format="svg", dpi=IMAGE_DPI)
    buf.seek(0)
    drawing = svg2rlg(buf)
    scale = width_mm * mm / drawing.width
    drawing.scale(scale, scale)
    drawing.width, drawing.height = drawing.width * scale, drawing.height * scale
    object.__setattr__(drawing, "__class__", _FigureDrawing)   # shapes check attributes
    return drawing


def _figure_classes():
    """The Drawing and renderer that put a figure's images in the PDF as image objects.

    reportlab's own renderer writes a Drawing's images inline in the page's content
    stream, which some PDF readers fail to parse; image objects (XObjects) are read by all.
    """
    from reportlab.graphics import renderPDF
    from reportlab.graphics.shapes import Drawing
    from reportlab.lib.utils import ImageReader

    class Renderer(renderPDF._PDFRenderer):
        def drawImage(self, image):
            if image.path is not None:
                self._canvas.drawImage(ImageReader(image.path), image.x, image.y,
                                       image.width, image.height)

    class FigureDrawing(Drawing):
        def draw(self, showBoundary=None):
            Renderer().draw(renderPDF.renderScaledDrawing(self), self.canv, 0, 0)

    FigureDrawing.__name__ = FigureDrawing.__qualname__ = "FigureDrawing"
    return FigureDrawing


_FigureDrawing = _figure_classes()
