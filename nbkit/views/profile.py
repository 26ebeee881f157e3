"""The profile panel: one weight's per-unit gain as units × steps images (output units, input features).

Each image shows, per unit and recorded step, log2(unit gain ÷ median unit gain): the unit gain is
run.profile(tensor, "gain", axis) (update RMS ÷ plain-step RMS over the unit's coordinates), and the
median is taken over that axis's units with a finite, positive gain at the same step. So ×1 is the
tensor's typical unit at that step, ×½ and ×2 are the damped / accelerated class boundaries of
DESIGN.md applied to units instead of coordinates. Light steps (no profile) and units whose gain is
undefined (zero gradient) stay blank: nothing is interpolated. A unit far from the median is worth a
look, not a fault by itself: the lists are a heuristic pointer.

`select_profile` and `extremes_at` are pure selections (NumPy in, NumPy out) used by the drawing
class `ProfileView`, by the explorer and by the report; tests call them without a widget.
"""
from __future__ import annotations

import textwrap
from dataclasses import dataclass

import numpy as np
from matplotlib.colors import LinearSegmentedColormap, Normalize
from matplotlib.ticker import MaxNLocator

from nbkit.errors import RecordingError
from nbkit.store.layout import DETAIL_CHUNK
from nbkit.views.common import GAIN_CLASS_COLOURS, OKABE_ITO, Blitter, compose_png, figure_png, make_canvas
from nbkit.views.data import with_gaps

WIDTH, HEIGHT = 620, 560
PIXEL_ROWS = 200          # image rows at most per axis (about the image's height in pixels)
OCTAVES = 4               # colour range: ×1/16 … ×16 of the median; beyond is the end colours
NAMED_UNITS = 24          # up to this many units, the axis is labelled with every unit's name
LISTED = 5                # units listed per side at the cursor
# Diverging, centred on the median: the class colours of the coordinate view (damped blue,
# accelerated orange) at the ends, a pale neutral in the middle; blanks are a darker grey.
GAIN_RATIO_MAP = LinearSegmentedColormap.from_list(
    "nbkit_unit_gain_ratio", [GAIN_CLASS_COLOURS["damped"], "#f4f4f4", GAIN_CLASS_COLOURS["accelerated"]]
).with_extremes(bad="#bdbdbd")
AXIS_WORDS = {"rows": "output units (rows)", "columns": "input features (columns)"}


@dataclass(frozen=True)
class ProfileImage:
    """What one profile image shows.

    values: (blocks, columns) log2(unit gain ÷ median), NaN where blank; ±inf for a zero / infinite gain.
    column_steps: (columns,) the step each image column starts at (evenly spaced from the first to the
      last recorded step; a column on no heavy step is NaN).
    block_starts: (blocks,) first unit of each image row; units [block_starts[i], block_starts[i + 1]).
    units: how many units the axis has; names: their names (run.unit_names).
    how: how the units were reduced to image rows, in words. why: "" or why there is no image.
    """

    tensor: str
    axis: str
    values: np.ndarray
    column_steps: np.ndarray
    block_starts: np.ndarray
    units: int
    names: list[str]
    how: str
    why: str = ""
    extremes: dict = None         # recording row -> UnitExtremes at each heavy row (full resolution)


@dataclass(frozen=True)
class UnitExtremes:
    """The units furthest from the median at one step: (name, gain ÷ median) pairs, furthest first."""

    step: int
    damped: list[tuple[str, float]]
    accelerated: list[tuple[str, float]]
    why: str = ""
    below_half: int = 0           # units with gain ÷ median < ½ (damped) at the step
    above_double: int = 0         # units with gain ÷ median > 2 (accelerated)
    defined: int = 0              # units with a defined gain at the step


def gain_ratio(gain: np.ndarray) -> np.ndarray:
    """(steps, units) gain ÷ the step's median over units with a finite, positive gain; NaN where the
    gain is NaN or the step has no such unit."""
    gain = np.asarray(gain, dtype=np.float64)
    usable = np.where(np.isfinite(gain) & (gain > 0), gain, np.nan)
    out = np.full_like(gain, np.nan)
    has = np.isfinite(usable).any(axis=1)
    if has.any():
        median = np.nanmedian(usable[has], axis=1, keepdims=True)
        with np.errstate(divide="ignore", invalid="ignore"):
            out[has] = gain[has] / median
    return out


def block_extremes(values: np.ndarray, blocks: int) -> tuple[np.ndarray, np.ndarray]:
    """Reduce (steps, units) to (steps, ≤blocks) by keeping, per block of consecutive units, the value
    with the largest |value| (NaN only where the whole block is NaN), so a single outlying unit stays
    visible however many units share its image row. Returns (reduced, block start units)."""
    steps, units = values.shape
    size = max(1, -(-units // max(blocks, 1)))
    starts = np.arange(0, units, size)
    if size == 1:
        return values, starts
    padded = np.full((steps, len(starts) * size), np.nan)
    padded[:, :units] = values
    shaped = padded.reshape(steps, len(starts), size)
    magnitude = np.where(np.isnan(shaped), -1.0, np.abs(shaped))
    pick = magnitude.argmax(axis=2)[..., None]
    return np.take_along_axis(shaped, pick, axis=2)[..., 0], starts


def select_profile(run, tensor: str, axis: str, *, pixel_rows: int = PIXEL_ROWS) -> ProfileImage:
    """The image of `tensor`'s unit gains along `axis` ("rows" or "columns"), for the whole recording.

    Read in blocks of DETAIL_CHUNK steps and reduced to at most `pixel_rows` image rows at once
    (block_extremes: per block of consecutive units, the value furthest from ×1 in log2), so a 50 000-row
    embedding costs one pass and little memory. Columns: the heavy steps on an even step grid
    (views.data.with_gaps), blank where no heavy step falls.
    """
    empty = ProfileImage(tensor, axis, np.zeros((0, 0)), np.zeros(0, np.int64), np.zeros(0, np.int64), 0, [], "")
    why = why_no_profile(run, tensor, axis)
    if why:
        return ProfileImage(**{**empty.__dict__, "why": why})
    steps, heavy = run.steps, np.flatnonzero(run.heavy)
    names = run.unit_names(tensor, axis)
    if len(heavy) == 0:
        return ProfileImage(**{**empty.__dict__, "names": names, "units": len(names),
                               "why": "no heavy step recorded yet: profiles are kept at heavy steps"})
    pieces, starts, extremes = [], np.zeros(0, np.int64), {}
    for first in range(0, len(steps), DETAIL_CHUNK):
        rows = heavy[(heavy >= first) & (heavy < first + DETAIL_CHUNK)]
        if len(rows) == 0:
            continue
        gain = run.profile(tensor, "gain", axis, rows=slice(first, first + DETAIL_CHUNK))[rows - first]
        ratio = gain_ratio(gain)                                       # (rows, units)
        # the cursor's lists, computed in the same pass: a cursor move reads nothing
        extremes.update(zip(rows.tolist(), unit_extremes(ratio, names, steps[rows])))
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.log2(ratio)
        reduced, starts = block_extremes(ratio, pixel_rows)
        pieces.append(reduced)
    values = np.concatenate(pieces)                                   # (heavy steps, blocks)
    column_steps, columns = with_gaps(steps[heavy], values, int(steps[0]), int(steps[-1]))
    size = int(starts[1] - starts[0]) if len(starts) > 1 else 1
    how = "one row per unit" if size == 1 else \
        f"{size} units per image row, each row showing its unit furthest from ×1"
    return ProfileImage(tensor, axis, columns.T, column_steps, starts, len(names), names, how, extremes=extremes)


def unit_extremes(ratio: np.ndarray, names: list[str], steps, *, count: int = LISTED) -> list[UnitExtremes]:
    """Per step (row of the (steps, units) gain ratios `ratio`): the `count` most damped units (ratio < 1,
    lowest first) and most accelerated (> 1, highest first), by name. Vectorised over the steps: a
    chunk of a 50 000-unit embedding costs one partition, not one per step."""
    ratio = np.atleast_2d(ratio)
    units = ratio.shape[1]
    defined = np.isfinite(ratio) | (ratio == np.inf)
    k = min(count, units)
    low_key = np.where(defined, ratio, np.inf)                  # undefined units sort last
    high_key = np.where(defined, -ratio, np.inf)
    if units > 4 * k:
        low = np.argpartition(low_key, k - 1, axis=1)[:, :k]
        high = np.argpartition(high_key, k - 1, axis=1)[:, :k]
    else:
        low = high = np.broadcast_to(np.arange(units), ratio.shape)
    low = np.take_along_axis(low, np.argsort(np.take_along_axis(low_key, low, 1), axis=1, kind="stable"), 1)[:, :k]
    high = np.take_along_axis(high, np.argsort(np.take_along_axis(high_key, high, 1), axis=1, kind="stable"), 1)[:, :k]
    with np.errstate(invalid="ignore"):
        below, above = (ratio < 0.5).sum(axis=1), (ratio > 2).sum(axis=1)
    out = []
    for r, step in enumerate(np.atleast_1d(steps)):
        step = int(step)
        if not defined[r].any():
            out.append(UnitExtremes(step, [], [], f"no unit has a defined gain at step {step}"))
            continue
        out.append(UnitExtremes(step, [(names[u], float(ratio[r, u])) for u in low[r] if ratio[r, u] < 1],
                                [(names[u], float(ratio[r, u])) for u in high[r] if ratio[r, u] > 1],
                                below_half=int(below[r]), above_double=int(above[r]), defined=int(defined[r].sum())))
    return out


def extremes_at(run, tensor: str, axis: str, row: int | None, *, count: int = LISTED) -> UnitExtremes:
    """unit_extremes of `tensor` along `axis` at recording row `row` (a heavy row; None: none yet),
    read from the recording."""
    step = int(run.steps[row]) if row is not None else -1
    why = why_no_profile(run, tensor, axis)
    if why or row is None:
        return UnitExtremes(step, [], [], why or "no heavy step at or before the cursor")
    ratio = gain_ratio(run.profile(tensor, "gain", axis, rows=slice(row, row + 1)))           # (1, units)
    return unit_extremes(ratio, run.unit_names(tensor, axis), [step], count=count)[0]


def why_no_profile(run, tensor: str, axis: str) -> str:
    """"" when run.profile(tensor, axis=axis) exists, else a short line saying why not."""
    if tensor not in run.tensors:
        return f"no tensor named {tensor!r}"
    if not run.profile_tensors:
        return "this recording has no per-unit profiles (recorded with profiles=False, or before nbkit kept them)"
    if tensor not in run.profile_tensors:
        shape = run.meta["tensors"][run.tensor_index(tensor)].get("shape", [])
        return (f"{tensor} has no profile: it is {len(shape)}-D {tuple(shape)}, and profiles are kept per unit "
                "of weights with 2 or more dimensions")
    try:
        run.profile(tensor, "gain", axis, rows=slice(0, 0))
    except RecordingError as error:                  # e.g. an embedding: no input-feature axis
        return f"no {AXIS_WORDS[axis]}: {error}"
    return ""


def ratio_words(ratio: float) -> str:
    """×0.031, ×2.5, ×1.2e+03: a gain ratio as the panel writes it."""
    return f"×{ratio:.2g}" if 1e-3 <= ratio < 1e4 else f"×{ratio:.1e}"


def extremes_text(extremes: UnitExtremes, axis: str) -> str:
    """One line per side, as plain text (the panel's page text and the PNG footer)."""
    if extremes.why:
        return f"{AXIS_WORDS[axis]}: {extremes.why}"
    def side(pairs):       # a default name is the unit's index: "#3" reads as a unit, "3" as a number
        return ", ".join(f"{'#' + name if name.isdigit() else name} {ratio_words(r)}" for name, r in pairs) or "none"
    e = extremes
    return (f"{AXIS_WORDS[axis]} at step {e.step}, unit gain ÷ median — most damped ({e.below_half} of "
            f"{e.defined} below ×½): {side(e.damped)}; most accelerated ({e.above_double} above ×2): "
            f"{side(e.accelerated)}")


def _octave_label(octave: int) -> str:
    return f"×{2 ** octave:g}" if octave >= 0 else f"×1/{2 ** -octave:g}"


class ProfileView:
    """The two profile images of one tensor (rows above columns), a colour bar and a cursor line.

    set_tensor(tensor) reads the images (a full draw follows); set_cursor(step, row) moves the cursor
    line and the lists of extreme units (`text`); the lines are page text, not figure text.
    """

    def __init__(self, run):
        self.run = run
        self.figure, self.canvas = make_canvas(WIDTH, HEIGHT, css_class="nbkit-profile")
        grid = self.figure.add_gridspec(2, 2, width_ratios=(1, 0.03), hspace=0.32, wspace=0.04,
                                        left=0.2, right=0.86, top=0.88, bottom=0.09)
        self.axes = {"rows": self.figure.add_subplot(grid[0, 0]), "columns": self.figure.add_subplot(grid[1, 0])}
        self.axes["columns"].sharex(self.axes["rows"])
        self.colour_axes = self.figure.add_subplot(grid[:, 1])
        norm = Normalize(-OCTAVES, OCTAVES)
        self.images, self.notes, self.cursors = {}, {}, {}
        self.blitter = Blitter(self.figure)
        for axis, ax in self.axes.items():
            self.images[axis] = ax.imshow(np.full((1, 1), np.nan), aspect="auto", interpolation="nearest",
                                          cmap=GAIN_RATIO_MAP, norm=norm, extent=(0, 1, 0.5, -0.5))
            ax.set_facecolor(GAIN_RATIO_MAP.get_bad())
            ax.set_ylabel(AXIS_WORDS[axis], fontsize=8)
            ax.tick_params(labelsize=7)
            self.notes[axis] = ax.text(0.5, 0.5, "", transform=ax.transAxes, ha="center", va="center",
                                       fontsize=8, wrap=True)
            self.cursors[axis] = self.blitter.add(ax.axvline(0, color=OKABE_ITO["reddish purple"], lw=1.2))
        self.axes["columns"].set_xlabel("optimizer step", fontsize=8)
        bar = self.figure.colorbar(self.images["rows"], cax=self.colour_axes, extend="both")
        bar.set_ticks(range(-OCTAVES, OCTAVES + 1), labels=[_octave_label(k) for k in range(-OCTAVES, OCTAVES + 1)])
        bar.ax.tick_params(labelsize=7)
        for boundary in (-1, 1):                     # the damped / accelerated class boundaries
            bar.ax.axhline(boundary, color=OKABE_ITO["black"], lw=1.0)
        bar.set_label("unit gain ÷ median unit gain (log scale)\n"
                      "below ×½ damped, above ×2 accelerated", fontsize=7)
        self.colourbar = bar
        self.title = self.figure.text(0.01, 0.985, "", fontsize=9, va="top", wrap=True)
        self.figure.text(0.01, 0.945, "grey: no value (light step, or a unit with zero gradient); a unit far "
                         "from ×1 is worth a look, not a fault by itself", fontsize=7, va="top", color="#555555")
        self.tensor = None
        self.selections: dict[str, ProfileImage] = {}
        self.extremes: dict[str, UnitExtremes] = {}
        self.text = ""

    def set_tensor(self, tensor: str) -> None:
        """Read and place both images of `tensor` (a full draw follows)."""
        self.tensor = tensor
        self.extremes = {}
        steps = self.run.steps
        span = (float(steps[0]), float(max(steps[-1] + 1, steps[0] + 1))) if len(steps) else (0.0, 1.0)
        for axis, ax in self.axes.items():
            picked = select_profile(self.run, tensor, axis)
            self.selections[axis] = picked
            image = self.images[axis]
            shown = picked.why == "" and picked.values.size > 0
            image.set_visible(shown)
            self.cursors[axis].set_visible(shown)
            if shown:
                ax.set_axis_on()
            else:
                ax.set_axis_off()
            self.notes[axis].set_text("" if shown else "\n".join(textwrap.wrap(picked.why, 70)))
            if not shown:
                continue
            # ±inf (a zero or infinite unit gain) shows as the end colours, not as a blank
            values = np.clip(picked.values, -4 * OCTAVES, 4 * OCTAVES)
            image.set_data(np.ma.masked_invalid(values))
            image.set_extent((*span, picked.units - 0.5, -0.5))
            ax.set_ylim(picked.units - 0.5, -0.5)
            if picked.units <= NAMED_UNITS:
                ax.set_yticks(range(picked.units), picked.names, fontsize=max(5, min(7, 140 / picked.units)))
            else:
                ticks = MaxNLocator(6, integer=True).tick_values(0, picked.units - 1)
                ticks = [int(u) for u in ticks if 0 <= u < picked.units]
                ax.set_yticks(ticks, [picked.names[u] for u in ticks])
            ax.set_title(f"{picked.units} {AXIS_WORDS[axis]}; {picked.how}", fontsize=7, loc="left")
        self.axes["rows"].set_xlim(*span)
        columns_shown = self.images["columns"].get_visible()
        self.axes["rows"].set_xlabel("" if columns_shown else "optimizer step", fontsize=8)
        self.title.set_text(f"unit gains ÷ median unit, per heavy step: {tensor}")

    def set_cursor(self, step: int, row: int | None) -> None:
        """Cursor line at `step`; the extreme units at the heavy row `row` (None: none yet) into `text`."""
        for axis in self.axes:
            self.cursors[axis].set_xdata([step, step])
        if self.tensor is None:
            return
        self.extremes = {}
        for axis, picked in self.selections.items():
            found = (picked.extremes or {}).get(row) if row is not None else None
            self.extremes[axis] = found or UnitExtremes(int(step), [], [], picked.why or
                                                         "no heavy step at or before the cursor")
        self.text = "\n".join(extremes_text(self.extremes[axis], axis) for axis in self.axes
                              if not self.selections.get(axis) or not self.selections[axis].why)
        if not self.text:
            self.text = self.selections["rows"].why if "rows" in self.selections else ""

    def png_bytes(self) -> bytes:
        """The figure and the lists at the cursor as one PNG."""
        return compose_png([[figure_png(self.figure)]], self.text)

    def close(self) -> None:
        self.blitter.stop()
        self.canvas.close()


def profile_png(run, tensor: str, step: int) -> bytes:
    """PNG of `tensor`'s profile panel with the cursor at `step` (the report's picture)."""
    view = ProfileView(run)
    try:
        view.set_tensor(tensor)
        rows = np.flatnonzero(np.asarray(run.heavy) & (np.asarray(run.steps) <= step))
        view.set_cursor(step, int(rows[-1]) if len(rows) else None)
        return view.png_bytes()
    finally:
        view.close()
