"""Helpers any nbkit view can reuse: colours, ipympl canvases, blitted redraws, PNG output."""
from __future__ import annotations

import base64
import io
import threading
import warnings
from pathlib import Path

import matplotlib
import numpy as np
from ipympl.backend_nbagg import Canvas, FigureManager
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, LogLocator, NullLocator
from PIL import Image, ImageDraw, ImageFont


# Okabe & Ito (2008), "Color Universal Design", eight colours safe for the common colour-vision
# deficiencies (hex values from memory). Grey for "ordinary" so the three classes stand out.
OKABE_ITO = {"orange": "#E69F00", "sky blue": "#56B4E9", "bluish green": "#009E73", "yellow": "#F0E442",
             "blue": "#0072B2", "vermillion": "#D55E00", "reddish purple": "#CC79A7", "black": "#000000"}
GAIN_CLASS_COLOURS = {"ordinary": "#9A9A9A", "damped": OKABE_ITO["blue"], "accelerated": OKABE_ITO["orange"],
                      "reversed": OKABE_ITO["vermillion"], "undefined": "#FFFFFF"}
MAGNITUDE_MAP = "viridis"     # perceptually uniform (matplotlib's own) for magnitudes
SHARE_MAP = "cividis"         # perceptually uniform, for shares in [0, 1]
DENSITY_MAP = "magma"         # perceptually uniform, for histogram images
SIGNED_MAP = "PuOr_r"         # diverging, centred on zero, for signed values (cosines)
SIGNED_QUANTITIES = {"grad_cosine", "update_grad_cosine"}
DEFAULT_QUANTITY = "update_ratio"   # the per-tensor quantity a view shows first
UNITS = {   # plain labels with units for the explorer's quantity axes
    "grad_norm": "gradient L2 norm (loss units per parameter unit)", "grad_rms": "gradient RMS",
    "grad_max": "largest |gradient|", "weight_norm": "weight L2 norm", "update_norm": "update L2 norm ‖Δθ‖",
    "update_ratio": "update-to-weight ratio ‖Δθ‖/‖θ‖", "gain_median": "median gain Δθ / (−lr·g)",
    "accelerated": "share accelerated", "damped": "share damped", "reversed": "share reversed",
    "momentum_factor_median": "median momentum factor", "scale_factor_median": "median scale factor",
    "residual_median": "median residual", "sign_flip": "share of gradient sign flips",
    "grad_cosine": "cosine with previous gradient", "update_grad_cosine": "cosine(update, −gradient)",
    "eps_share": "share with ε-dominated denominator", "zero_grad_share": "share with zero gradient",
    "lost_update_share": "share of lost updates", "dead_rows": "rows with all-zero gradient (count)",
    "nonfinite": "non-finite values (count)", "sharpness": "sharpness (largest Hessian eigenvalue)",
    "noise_scale": "gradient noise scale (samples)",
}


def _plain_number(value, _position=None) -> str:
    return f"{value:g}" if 1e-3 <= abs(value) < 1e4 or value == 0 else f"{value:.0e}".replace("e-0", "e-").replace("e+0", "e")


def plain_log_ticks(axis) -> None:
    """Plain tick labels (1e-5, 0.01, 100) and no minor ticks on a log-scaled matplotlib Axis.

    matplotlib's default log ticks are typeset as mathtext (10^-5) with eight minor ticks a decade;
    measured here they were a quarter of a full draw (~0.9 s of CPU over the explorer's first draw).
    """
    if axis.get_scale() != "log":
        return
    axis.set_major_locator(LogLocator(numticks=6))
    axis.set_major_formatter(FuncFormatter(_plain_number))
    axis.set_minor_locator(NullLocator())


def label_of(q: str) -> str:
    return UNITS.get(q, q.replace("_", " "))


class ViewCanvas(Canvas):
    """ipympl's Canvas with a faster PNG encoder for the images it sends after each redraw.

    get_diff_image follows matplotlib 3.11's FigureCanvasWebAggCore.get_diff_image
    (backends/backend_webagg_core.py) line for line, except that it encodes with zlib level 1:
    on these machines that halves the encoding time of a mostly-empty diff image (24 ms -> 12 ms
    for 600 x 640 pixels, measured here), which is most of a cursor move's cost.
    """

    def get_diff_image(self):
        if not self._png_is_old:
            return None
        pixels = np.asarray(self.get_renderer().buffer_rgba())
        buff = pixels.view(np.uint32).squeeze(2)
        if (self._force_full or buff.shape != self._last_buff.shape
                or (pixels[:, :, 3] != 255).any()):
            self.set_image_mode("full")
            output = buff
        else:
            self.set_image_mode("diff")
            output = np.where(buff != self._last_buff, buff, 0)
        self._last_buff = buff.copy()
        self._force_full = False
        self._png_is_old = False
        data = output.view(dtype=np.uint8).reshape((*output.shape, 4))
        with io.BytesIO() as png:
            Image.fromarray(data).save(png, format="png", compress_level=1)
            return png.getvalue()

    def send_binary(self, data):
        # ipympl 0.10's send_binary, while no browser has said "initialized", replaces the PNG
        # it was given by the raw RGBA pixels before sending them, so a browser showing the
        # canvas while the kernel is busy (a live view during training) gets a broken image.
        # Here the PNG is always what is sent; the static copy (_data_url) is kept as ipympl
        # keeps it.
        if self.syncing_data_url:
            png = data if self._current_image_mode == "full" else _png(self._last_buff)
            self._data_url = base64.b64encode(png).decode("utf-8")
        self.send({"data": '{"type": "binary"}'}, buffers=[data])

    def force_full_frame(self):
        """Make the next image sent a full frame, not a diff (FigureCanvasWebAggCore's own flag)."""
        self._force_full = True

    def send_full_frame(self):
        """Send the whole current image now as a full frame (it replaces any diff a browser skipped)."""
        self._force_full = True
        self._png_is_old = True
        self.manager.refresh_all()


def _png(buff):
    with io.BytesIO() as out:
        Image.fromarray(buff.view(dtype=np.uint8).reshape((*buff.shape, 4))).save(
            out, format="png", compress_level=1)
        return out.getvalue()


def make_canvas(width_px: int, height_px: int, *, css_class: str, dpi: int = 100):
    """A matplotlib Figure on its own ipympl Canvas widget, not registered with pyplot.

    Building the Figure directly (not plt.figure) means it is never shown twice and never leaks
    into pyplot's figure list, which is what `with plt.ioff():` is usually there to prevent.
    """
    figure = Figure(figsize=(width_px / dpi, height_px / dpi), dpi=dpi)
    canvas = ViewCanvas(figure)
    with warnings.catch_warnings():      # ipympl 0.10's Toolbar passes traitlets an argument it deprecates
        warnings.simplefilter("ignore", DeprecationWarning)
        manager = FigureManager(canvas, id(figure))
    # Publish the size now (ipympl does it when the browser says "initialized", which a kernel busy
    # in a training loop never reads): a live view then shows at its size from the first image on.
    manager.resize(width_px, height_px)
    canvas.header_visible = False
    canvas.footer_visible = False
    canvas.toolbar_visible = False
    canvas.resizable = False
    canvas.add_class(css_class)
    return figure, canvas


class Blitter:
    """Redraws a figure's animated artists over a saved background instead of drawing it all.

    A full Agg draw costs tens of milliseconds per axes; restoring the background and drawing the
    few artists that follow the cursor costs a few. The background is re-saved after every full
    draw (matplotlib's draw_event), which also covers resizes and dpi changes from the browser.
    """

    HEAL_SECONDS = 0.4

    def __init__(self, figure, lock=None):
        self.figure = figure
        self.artists: list = []
        self._background = None
        self.lock = lock or threading.RLock()
        self._heal_timer = None
        figure.canvas.mpl_connect("draw_event", self._on_draw)

    def add(self, artist):
        artist.set_animated(True)
        self.artists.append(artist)
        return artist

    def _on_draw(self, event):
        canvas = self.figure.canvas
        self._background = canvas.copy_from_bbox(self.figure.bbox)
        for artist in self.artists:
            self.figure.draw_artist(artist)

    def full(self):
        """Full redraw (data behind the cursor changed). Pushes the image to the browser at once."""
        self.figure.canvas.draw()

    def update(self):
        """Cheap redraw after animated artists changed."""
        canvas = self.figure.canvas
        if self._background is None:
            return self.full()
        canvas.restore_region(self._background)
        for artist in self.artists:
            self.figure.draw_artist(artist)
        canvas.blit(self.figure.bbox)
        self._schedule_heal()

    def _schedule_heal(self):
        """Send one full frame shortly after the last blit of a burst.

        Blits reach the browser as diff images, and ipympl's front end skips an image that is still
        loading when the next arrives; a skipped diff leaves stale pixels (seen here: a second
        cursor line after a fast drag). The figure's Agg buffer always holds the whole current
        image, so re-sending it as a full frame heals whatever was skipped.
        """
        if self._heal_timer is not None:
            self._heal_timer.cancel()
        self._heal_timer = threading.Timer(self.HEAL_SECONDS, self._heal)
        self._heal_timer.daemon = True
        self._heal_timer.start()

    def _heal(self):
        with self.lock:
            try:
                self.figure.canvas.send_full_frame()
            except Exception:                      # noqa: BLE001 - a closed canvas; nothing to heal
                pass

    def stop(self):
        if self._heal_timer is not None:
            self._heal_timer.cancel()


def figure_png(figure) -> np.ndarray:
    """(height, width, 4) uint8 RGBA of the figure as it is now."""
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=figure.dpi)
    buffer.seek(0)
    return np.asarray(Image.open(buffer).convert("RGBA"))


def _footer_font():
    """Matplotlib's own DejaVu Sans (it covers ε, √, ×, …), at the size of the figures' small labels."""
    return ImageFont.truetype(str(Path(matplotlib.get_data_path()) / "fonts" / "ttf" / "DejaVuSans.ttf"), 12)


def _wrap(line: str, font, width: int) -> list[str]:
    """Break a footer line at spaces so that each piece fits `width` pixels."""
    pieces, current = [], ""
    for word in line.split(" "):
        candidate = f"{current} {word}" if current else word
        if current and font.getlength(candidate) > width:
            pieces.append(current)
            current = "    " + word
        else:
            current = candidate
    return pieces + [current]


def compose_png(rows: list[list[np.ndarray]], footer: str = "") -> bytes:
    """Stack rows of RGBA images (each row side by side) on white, with a text footer; PNG bytes."""
    row_images = []
    for row in rows:
        height = max(img.shape[0] for img in row)
        width = sum(img.shape[1] for img in row)
        canvas = Image.new("RGBA", (width, height), "white")
        x = 0
        for img in row:
            canvas.paste(Image.fromarray(img), (x, 0))
            x += img.shape[1]
        row_images.append(canvas)
    width = max(r.width for r in row_images)
    font = _footer_font()
    lines = [piece for line in footer.splitlines() for piece in _wrap(line, font, width - 16)]
    line_height = 16
    text_height = line_height * len(lines) + (10 if lines else 0)
    out = Image.new("RGBA", (width, sum(r.height for r in row_images) + text_height), "white")
    y = 0
    for r in row_images:
        out.paste(r, (0, y))
        y += r.height
    draw = ImageDraw.Draw(out)
    for k, line in enumerate(lines):
        draw.text((8, y + 5 + line_height * k), line, fill="black", font=font)
    buffer = io.BytesIO()
    out.convert("RGB").save(buffer, format="png")
    return buffer.getvalue()


def clipped_texts(figure) -> list[str]:
    """What of `figure` reaches past its edges once drawn: each visible axes whose drawn titles, labels
    and tick labels stick out (named by its title or axis labels), and each figure-level text, as
    "name (how far past, px)"; [] when everything fits. For tests and checks."""
    figure.canvas.draw()
    renderer = figure.canvas.get_renderer()
    box = figure.bbox

    def past(extent):
        return max(box.x0 - extent.x0, extent.x1 - box.x1, box.y0 - extent.y0, extent.y1 - box.y1)

    out = []
    for ax in figure.axes:
        if not ax.get_visible() or not ax.axison:
            continue
        extent = ax.get_tightbbox(renderer, bbox_extra_artists=[t for t in ax.texts if t.get_visible()])
        if extent is not None and past(extent) > 1:
            name = ax.get_title(loc="left") or ax.get_title() or ax.get_ylabel() or ax.get_xlabel() or "an axes"
            out.append(f"{name!r} ({past(extent):.0f} px past the edge)")
    for text in figure.texts:
        if text.get_visible() and str(text.get_text()).strip() and past(text.get_window_extent(renderer)) > 1:
            out.append(f"{text.get_text()!r} ({past(text.get_window_extent(renderer)):.0f} px past the edge)")
    return out
