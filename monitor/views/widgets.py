"""Widgets of the live screen. Each renders data it is handed (from an engine snapshot); none
computes a spectrum. Large, fast-changing areas are drawn line by line (``render_line`` ->
``Strip``) with precomputed styles and cached rows."""

from __future__ import annotations

from collections import deque

import numpy as np
from rich.segment import Segment
from rich.style import Style
from textual.geometry import Region
from textual.strip import Strip
from textual.widget import Widget

from .scale import AXIS_COLOURS, HEAT, MOTOR_COLOURS, column_bins, column_levels_db, column_of, level_index

AXES = ("roll", "pitch", "yaw")
EIGHTHS = " ▁▂▃▄▅▆▇█"
ORDER_MARKS = ("1", "2", "b", "B")  # 1x, 2x, blade-pass, 2x blade-pass
BASE = Style(color="#e2dacb", bgcolor="#17150f")
DIM = Style(color="#8e8372", bgcolor="#17150f")
BAND = Style(bgcolor="#1f2d23")
CURSOR_BG = "#4d4437"
HEAT_STYLES = [Style(color=c, bgcolor="#17150f") for c in HEAT]
HALF_STYLES = [[Style(color=HEAT[a], bgcolor=HEAT[b]) for b in range(len(HEAT))] for a in range(len(HEAT))]
GAP_STYLE = Style(color="#ff5555", bgcolor="#17150f")
MARK_STYLES = [DIM] + [Style(color=c, bgcolor="#17150f", bold=True) for c in MOTOR_COLOURS]
BG_KINDS = ("#17150f", "#1f2d23", CURSOR_BG)  # plain, inside a mode's half-power band, cursor
BAR_STYLES = [[Style(color=c, bgcolor=bg) for bg in BG_KINDS] for c in AXIS_COLOURS]
#: crossing-watch states: words and symbols carry the meaning, colour repeats it
STATE_STYLES = {
    "clear": Style(color="#7ee081", bgcolor="#17150f"),
    "nearing": Style(color="#ffd166", bgcolor="#17150f", bold=True),
    "crossing": Style(color="#ffffff", bgcolor="#8b1e2d", bold=True),
}
STRAY_STYLE = Style(color="#c3a6ff", bgcolor="#17150f")
CAUTION_STYLE = Style(color="#ffd27a", bgcolor="#5a3a00")
STATUS_STYLE = Style(color="#e2dacb", bgcolor="#25211a")
TITLE_STYLE = Style(color="#aa9e8a", bgcolor="#17150f")


_EIGHTHS_ARR = np.array(list(EIGHTHS))


def _runs(kinds: np.ndarray) -> list[tuple[int, int, int]]:
    """(start, end, value) of the runs of equal values in ``kinds``."""
    if kinds.size == 0:
        return []
    cut = np.flatnonzero(np.diff(kinds)) + 1
    starts = np.concatenate([[0], cut])
    ends = np.concatenate([cut, [kinds.size]])
    return [(int(a), int(b), int(kinds[a])) for a, b in zip(starts, ends, strict=True)]


def _text_strip(text: str, width: int, style: Style = BASE) -> Strip:
    return Strip([Segment(text[:width].ljust(width), style)], width)


class SpectrumView(Widget):
    """Log-magnitude spectrum per visible axis, mode bands shaded, motor orders marked, a cursor."""

    DEFAULT_CSS = "SpectrumView { height: 1fr; }"
    LABEL_W = 6

    def __init__(self, **kw):
        super().__init__(**kw)
        self.axes_shown = [True, True, True]
        self.use_peak = False
        self.fmax_hz = 1000.0
        self.cursor_col = 20
        self.span_db = 60.0
        self._lines: list[Strip] = []
        self.snapshot = None
        self.profile_modes: list = []
        self.readout = ""

    def plot_width(self) -> int:
        return max(10, self.size.width - self.LABEL_W)

    def update_snapshot(self, snap, modes) -> None:
        self.snapshot = snap
        self.profile_modes = modes
        old = self._lines
        self._build()
        new = self._lines
        if len(old) != len(new) or not new:
            self.refresh()
            return
        w = self.size.width
        changed = [y for y, (a, b) in enumerate(zip(old, new, strict=True)) if a != b]
        if len(changed) > 0.8 * len(new):
            self.refresh()
        elif changed:  # repaint only the lines that differ: fewer escape codes for the terminal
            self.refresh(*[Region(0, y, w, 1) for y in changed])

    def cursor_frequency(self) -> float | None:
        s = self.snapshot
        if s is None or s.psd is None:
            return None
        edges = column_bins(s.freqs, self.plot_width(), self.fmax_hz)
        c = min(self.cursor_col, len(edges) - 2)
        lo, hi = edges[c], max(edges[c + 1], edges[c] + 1)
        src = s.peak if self.use_peak and s.peak is not None else s.psd
        tot = src[lo:hi, [i for i in range(3) if self.axes_shown[i]] or [0]].sum(axis=1)
        k = lo + int(np.argmax(tot))
        return float(s.freqs[k])

    def _build(self) -> None:
        w, h = self.size.width, self.size.height
        s = self.snapshot
        if w <= 0 or h <= 0:
            return
        if s is None or s.psd is None:
            self._lines = [_text_strip(" waiting for spectra...", w, DIM)] + [_text_strip("", w)] * (h - 1)
            return
        pw = self.plot_width()
        edges = column_bins(s.freqs, pw, self.fmax_hz)
        src = s.peak if self.use_peak and s.peak is not None else s.psd
        shown = [i for i in range(3) if self.axes_shown[i]] or [0]
        levels = np.stack([column_levels_db(src[:, i], edges) for i in shown])  # (A, columns)
        top = float(np.ceil(levels.max() / 10.0) * 10.0)
        bottom = top - self.span_db
        band_cols = np.zeros(pw, bool)
        for m in self.profile_modes:
            lo_c = column_of(m.band_hz[0], s.freqs, edges)
            hi_c = column_of(m.band_hz[1], s.freqs, edges)
            if lo_c is not None and hi_c is not None:
                band_cols[lo_c : hi_c + 1] = True
        marks = [" "] * pw
        mark_kind = np.zeros(pw, int)  # 0 none, 1 + motor index
        bin_hz = s.freqs[1] - s.freqs[0]
        if s.order_hz.size:
            k_bins = np.rint(np.nan_to_num(s.order_hz, nan=-1.0) / bin_hz).astype(int)  # (motors, orders)
            cols = np.searchsorted(edges, k_bins, side="right") - 1
            ok = (k_bins >= edges[0]) & (k_bins < edges[-1])
            for mi, k in zip(*np.nonzero(ok), strict=True):
                c = int(cols[mi, k])
                marks[c] = ORDER_MARKS[k]
                mark_kind[c] = 1 + mi % len(MOTOR_COLOURS)
        cur = min(self.cursor_col, pw - 1)
        lines = []
        # row 0: order markers
        mark_text = "".join(marks)
        segs = [Segment(" " * self.LABEL_W, DIM)]
        segs += [Segment(mark_text[a:b], MARK_STYLES[k]) for a, b, k in _runs(mark_kind)]
        lines.append(Strip(segs, w))
        plot_rows = max(1, h - 2)
        per_axis = max(1, plot_rows // len(shown))
        rows_up = np.arange(per_axis - 1, -1, -1)[:, None]  # (per_axis, 1) rows above the bottom
        # level ticks every 20 dB (10 dB when an axis has room): the row holding each tick level
        step_db = 10.0 if per_axis >= 12 else 20.0
        ticks_db = {}
        for lv in np.arange(top, bottom - 1e-9, -step_db):
            r = min(per_axis - 1, int((top - lv) / self.span_db * per_axis))
            if r > 0 and r not in ticks_db:
                ticks_db[r] = f"{lv:5.0f} "
        if per_axis <= 3:  # too short for ticks: the bottom row says where the scale ends
            ticks_db = {per_axis - 1: f"{bottom:5.0f} "} if per_axis > 1 else {}
        else:
            ticks_db.setdefault(per_axis - 1, f"{bottom:5.0f} ")
        for a, ax in enumerate(shown):
            frac = np.clip((levels[a] - bottom) / self.span_db, 0, 1) * per_axis  # bar height in rows
            styles = BAR_STYLES[ax]
            bgk = np.where(band_cols, 1, 0)
            bgk[cur] = 2
            runs = _runs(bgk)
            # every row of the axis at once: eighths filled per cell, then each row viewed as one string
            fill = np.clip(frac[None, :] - rows_up, 0, 1)
            cells = np.ascontiguousarray(_EIGHTHS_ARR[np.rint(fill * 8).astype(np.intp)])
            row_text = cells.view(f"<U{pw}").ravel().tolist()
            for r in range(per_axis):
                chars = row_text[r]
                label = f"{AXES[ax]:>5} " if r == 0 else ticks_db.get(r, "")
                segs = [Segment(label.ljust(self.LABEL_W)[: self.LABEL_W], DIM)]
                segs += [Segment(chars[a:b], styles[k]) for a, b, k in runs]
                lines.append(Strip(segs, w))
        # frequency ticks
        ticks = [" "] * pw
        step = max(50, int(round(self.fmax_hz / max(1, pw // 8) / 50.0)) * 50)
        for f in range(0, int(self.fmax_hz) + 1, step):
            c = column_of(float(f), s.freqs, edges) if f > 0 else 0
            label = f"{f}"
            if c is not None and c + len(label) <= pw and all(ch == " " for ch in ticks[max(0, c - 1): c + len(label)]):
                ticks[c: c + len(label)] = list(label)  # whole labels only, never cut at the edge
        lines.append(Strip([Segment(" Hz".ljust(self.LABEL_W), DIM), Segment("".join(ticks), DIM)], w))
        while len(lines) < h:
            lines.append(_text_strip("", w))
        self._lines = lines[:h]
        fcur = self.cursor_frequency()
        if fcur is not None:
            k = int(round(fcur / (s.freqs[1] - s.freqs[0])))
            lv = 10 * np.log10(max(float(src[k, shown].sum()), 1e-30))
            self.readout = f"cursor {fcur:7.1f} Hz  {lv:+6.1f} dB"

    def on_resize(self, event) -> None:
        self._build()
        self.refresh()

    def render_line(self, y: int) -> Strip:
        if y < len(self._lines):
            return self._lines[y]
        return _text_strip("", self.size.width)


class WaterfallView(Widget):
    """Time x frequency heat map of the visible axes' PSD, two time rows per text row (half
    blocks), newest at the top, gaps marked, with a dB colour legend on its last line. Text row
    pairs are anchored to absolute row numbers, so a new spectrum changes one cached Strip."""

    DEFAULT_CSS = "WaterfallView { height: 1fr; }"
    LABEL_W = 6

    def __init__(self, **kw):
        super().__init__(**kw)
        self.rows: deque = deque(maxlen=200)  # (level index per column, gap flag, frame end time s)
        self.total = 0  # rows ever added (absolute index of the next row)
        self.axes_shown = [True, True, True]
        self.fmax_hz = 1000.0
        self.top_db = -10.0
        self.span_db = 60.0
        self._pairs: dict[int, Strip] = {}
        self._width = 0

    def add_rows(self, rows: np.ndarray, marks: np.ndarray, freqs: np.ndarray) -> None:
        if rows.shape[0] == 0 or freqs.size == 0:
            return
        pw = max(10, self.size.width - self.LABEL_W)
        if pw != self._width:
            self._width = pw
            self.rows.clear()
            self._pairs.clear()
            self.total = 0
        edges = column_bins(freqs, pw, self.fmax_hz)
        shown = [i for i in range(3) if self.axes_shown[i]] or [0]
        tot = rows[:, :, shown].sum(axis=2)
        db = 10 * np.log10(np.maximum(tot, 1e-30))
        cols = np.maximum.reduceat(db, np.minimum(edges[:-1], db.shape[1] - 1), axis=1)
        top = float(np.ceil(cols.max() / 10) * 10)
        if top > self.top_db or top < self.top_db - 20:  # rescale only on a real change
            self.top_db = top
            self._pairs.clear()
        for i in range(cols.shape[0]):
            self.rows.append((level_index(cols[i], self.top_db, self.span_db), bool(marks[i, 1]), float(marks[i, 0])))
            self._pairs.pop(self.total // 2, None)
            self.total += 1
        for k in [k for k in self._pairs if k < (self.total - len(self.rows)) // 2]:
            del self._pairs[k]
        self.refresh()

    def clear(self) -> None:
        self.rows.clear()
        self._pairs.clear()
        self.total = 0
        self.refresh()

    def _pair_strip(self, pair: int, w: int) -> Strip:
        pw = max(10, w - self.LABEL_W)
        first = self.total - len(self.rows)
        i_new, i_old = 2 * pair + 1 - first, 2 * pair - first  # upper half newer, lower half older
        if i_old < 0 and i_new < 0:
            return Strip([Segment(" " * w, BASE)], w)
        empty = (np.zeros(pw, int), False, 0.0)
        top, gap_t, _ = self.rows[i_new] if 0 <= i_new < len(self.rows) else empty
        bot, gap_b, _ = self.rows[i_old] if 0 <= i_old < len(self.rows) else empty
        segs = []
        run, st = [], None
        gap = gap_t or gap_b
        for c in range(min(pw, len(top))):
            s = GAP_STYLE if gap and c % 4 == 0 else HALF_STYLES[top[c]][bot[c]]
            ch = "─" if s is GAP_STYLE else "▀"
            if s is st:
                run.append(ch)
            else:
                if run:
                    segs.append(Segment("".join(run), st))
                run, st = [ch], s
        if run:
            segs.append(Segment("".join(run), st))
        return Strip(segs, pw)

    def render_line(self, y: int) -> Strip:
        w, h = self.size.width, self.size.height
        if y == h - 1:
            return self._legend(w)
        newest_pair = (self.total - 1) // 2
        pair = newest_pair - y
        label = "  now " if y == 0 else "      "
        if y and y % 4 == 0 and self.rows:  # seconds before the newest spectrum, every fourth row
            i = 2 * pair - (self.total - len(self.rows))
            if 0 <= i < len(self.rows):
                label = f"{self.rows[i][2] - self.rows[-1][2]:5.1f}s"
        if pair < 0 or self.total == 0:
            return Strip([Segment(label[: self.LABEL_W], DIM), Segment(" " * max(0, w - self.LABEL_W), BASE)], w)
        body = self._pairs.get(pair)
        if body is None:
            body = self._pair_strip(pair, w)
            self._pairs[pair] = body
        return Strip.join([Strip([Segment(label[: self.LABEL_W], DIM)], self.LABEL_W), body])

    def _legend(self, w: int) -> Strip:
        segs = [Segment(f"{self.top_db - self.span_db:5.0f} ", DIM)]
        for st in HEAT_STYLES:
            segs.append(Segment("█", st))
        room = w - 6 - len(HEAT_STYLES)
        for text in (f" {self.top_db:.0f} dB re (deg/s)^2/Hz   -- gap", f" {self.top_db:.0f} dB re (deg/s)^2/Hz",
                     f" {self.top_db:.0f} dB", ""):
            if len(text) <= room:  # the longest legend that fits, never a cut one
                segs.append(Segment(text, DIM))
                break
        return Strip(segs).crop_extend(0, w, BASE)  # exactly w cells, or the next widget shifts left


Line = str | list[tuple[str, Style]]


class TextPanel(Widget):
    """Lines of text drawn with the line API. Setting the same text again costs nothing; new text
    repaints the panel but never re-lays the screen out (its height changes only when its number
    of lines does), unlike a ``Static`` whose every update re-lays out its container."""

    DEFAULT_CSS = "TextPanel { height: 1; }"

    def __init__(self, lines: list[Line] | None = None, style: Style = BASE, auto_height: bool = True, **kw):
        super().__init__(**kw)
        self.base_style = style
        self.auto_height = auto_height
        self._lines: list[Line] = []
        self._strips: dict[int, Strip] = {}
        if lines:
            self.set_lines(lines)

    @property
    def text(self) -> str:
        """The panel's text (for tests and logs)."""
        return "\n".join(x if isinstance(x, str) else "".join(t for t, _ in x) for x in self._lines)

    def set_lines(self, lines: list[Line]) -> None:
        if lines == self._lines:
            return
        count_changed = len(lines) != len(self._lines)
        self._lines = list(lines)
        self._strips.clear()
        if count_changed and self.auto_height:
            self.styles.height = max(1, len(lines)) + self.styles.gutter.height  # the only case needing a layout
        self.refresh()

    def render_line(self, y: int) -> Strip:
        w = self.size.width
        hit = self._strips.get(y)
        if hit is not None and hit.cell_length == w:
            return hit
        if y >= len(self._lines):
            strip = _text_strip("", w, self.base_style)
        else:
            line = self._lines[y]
            segs = [Segment(line, self.base_style)] if isinstance(line, str) else [Segment(t, s) for t, s in line]
            strip = Strip(segs).crop_extend(0, w, self.base_style)
        self._strips[y] = strip
        return strip


class EventLog(Widget):
    """The newest events, newest at the bottom; a bounded deque, drawn with the line API."""

    DEFAULT_CSS = "EventLog { height: 1fr; }"

    def __init__(self, capacity: int = 200, **kw):
        super().__init__(**kw)
        self.lines: deque[tuple[str, Style]] = deque(maxlen=capacity)
        self._strips: dict[tuple[int, int], Strip] = {}
        self.total = 0  # lines ever written (absolute index of the next one)

    @property
    def text(self) -> str:
        return "\n".join(t for t, _ in self.lines)

    def write(self, text: str, style: Style = BASE) -> None:
        for part in text.splitlines() or [""]:
            self.lines.append((part, style))
            self.total += 1
        if len(self._strips) > 4 * self.lines.maxlen:
            self._strips.clear()
        self.refresh()

    def render_line(self, y: int) -> Strip:
        w, h = self.size.width, self.size.height
        i = len(self.lines) - h + y  # the last h lines fill the panel, oldest first
        if i < 0:
            return _text_strip("", w)
        key = (self.total - len(self.lines) + i, w)
        hit = self._strips.get(key)
        if hit is None:
            line, style = self.lines[i]
            hit = Strip([Segment(line[:w].ljust(w), style)], w)
            self._strips[key] = hit
        return hit
