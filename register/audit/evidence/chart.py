"""The pack's PFD(t) chart, drawn once per SIF as a vector drawing (reportlab graphics).

The same drawing goes into the PDF as vector (lines and hatches stay sharp on paper, no
raster step) and, through a small raster walker over its shapes (Pillow), into the zip as
``charts/<tag>-pfd.png``. It shows what the page's chart shows (``register.charts``: its
scale, SIL bands with their hatches and names, target line, observed episodes and the
moments failures were found, legend), with the same colours, hatches and labels.

A chart is made from its *series*, a plain dict (``series()``) that the section tasks
store as JSON and the assembly draws from: no engine run per drawing.
"""

from __future__ import annotations

import datetime as dt
import math

from register.charts import (
    BAND_GREY,
    BAND_HATCH,
    EPISODE_EDGE,
    EPISODE_FACE,
    EPISODE_HATCH,
    EPISODE_LABEL,
    FOUND_LABEL,
    PACK_HEIGHT_IN,
    PACK_WIDTH_IN,
    _limits,
)

#: Resolution of the PNG copy in the zip (the PDF has the vector drawing).
PNG_DPI = 120
_BAND_EDGE = "#9a9a9a"
_GRID = "#999999"
_FONT = "DejaVu"
# Room around the plot area, in points: y ticks and label, SIL names, title, x ticks.
_LEFT, _RIGHT, _TOP, _BOTTOM = 46.0, 34.0, 16.0, 16.0
_HATCH_STEP = 5.0  # points between hatch lines


def series(tag: str, times, values, target: float | None, start: dt.datetime,
           end: dt.datetime, episodes) -> dict:
    """What a chart is drawn from, JSON-ready (times as ISO strings)."""
    return {"tag": tag, "times": [t.isoformat() for t in times],
            "values": [float(v) for v in values], "target": target,
            "start": start.isoformat(), "end": end.isoformat(),
            "episodes": [{"onset_from": e["onset_from"].isoformat(),
                          "onset_to": (e.get("onset_to") or e["restored_at"]).isoformat(),
                          "restored_at": e["restored_at"].isoformat()}
                         for e in episodes or []]}


def _when(text: str) -> dt.datetime:
    return dt.datetime.fromisoformat(text)


def _hex(colour: str):
    from reportlab.lib import colors

    return colors.HexColor(colour)


def _hatch_lines(x0, y0, x1, y1, pattern: str, step=_HATCH_STEP):
    """Line segments hatching the rectangle (x0, y0)-(x1, y1) after ``pattern`` (the
    matplotlib pattern of ``register.charts``): "/" rising, "\\" falling, "x" both, "|"
    vertical, "." dots (short marks)."""
    out = []
    w, h = x1 - x0, y1 - y0
    if w <= 0 or h <= 0:
        return out
    kinds = set(pattern)
    for rising in [k for k in (True, False) if (("/" if k else "\\") in kinds) or "x" in kinds]:
        # lines y - y0 = +-(x - x0) + c, c stepping over the rectangle
        c = -w
        while c < h:
            pts = []
            for x in (x0, x1):
                y = y0 + c + ((x - x0) if rising else (x1 - x))
                if y0 <= y <= y1:
                    pts.append((x, y))
            for y in (y0, y1):
                x = x0 + (y - y0 - c) if rising else x1 - (y - y0 - c)
                if x0 <= x <= x1:
                    pts.append((x, y))
            pts = sorted(set(pts))
            if len(pts) >= 2:
                out.append((*pts[0], *pts[-1]))
            c += step * 1.4142
    if "|" in kinds:
        x = x0 + step / 2
        while x < x1:
            out.append((x, y0, x, y1))
            x += step
    if "." in kinds:  # dots on a wider grid than lines: as light as the page's
        dot = step * 1.6
        y = y0 + dot / 2
        while y < y1:
            x = x0 + dot / 2
            while x < x1:
                out.append((x, y, x + 0.8, y))
                x += dot
            y += dot
    return out


def _month_ticks(start: dt.datetime, end: dt.datetime, most=9) -> list[dt.datetime]:
    months = (end.year - start.year) * 12 + end.month - start.month + 1
    step = next(s for s in (1, 2, 3, 4, 6, 12, 24, 36, 60, 120) if months / s <= most)
    year, month = start.year, start.month
    ticks = []
    while True:
        if month > 12:
            year, month = year + (month - 1) // 12, (month - 1) % 12 + 1
        t = dt.datetime(year, month, 1, tzinfo=start.tzinfo or dt.UTC)
        if t > end:
            break
        if t >= start and (month - 1) % step == 0:
            ticks.append(t)
        month += 1
    return ticks


def _path(segments, colour, width):
    """Many line segments (hatches) as one path: one shape, not one per line."""
    from reportlab.graphics.shapes import Path

    p = Path(strokeColor=colour, strokeWidth=width, fillColor=None)
    for x0, y0, x1, y1 in segments:
        p.moveTo(x0, y0)
        p.lineTo(x1, y1)
    return p


def drawing(data: dict, width_pt: float):
    """The chart of ``data`` (see ``series``) as a reportlab Drawing ``width_pt`` wide."""
    from reportlab import rl_config

    checking, rl_config.shapeChecking = rl_config.shapeChecking, 0  # our own shapes only
    try:
        return _drawing(data, width_pt)
    finally:
        rl_config.shapeChecking = checking


def _drawing(data: dict, width_pt: float):
    from reportlab.graphics.shapes import Drawing, Group, Line, PolyLine, Rect, String
    from reportlab.lib import colors

    from register.calculations import calculations

    height_pt = width_pt * PACK_HEIGHT_IN / PACK_WIDTH_IN
    d = Drawing(width_pt, height_pt)
    ax0, ay0 = _LEFT, _BOTTOM
    ax1, ay1 = width_pt - _RIGHT, height_pt - _TOP
    start, end = _when(data["start"]), _when(data["end"])
    times = [_when(t) for t in data["times"]]
    values = [max(float(v), 1e-9) for v in data["values"]]
    target = data.get("target")
    low, high = _limits(values, target)
    llo, lhi = math.log10(low), math.log10(high)
    span = max((end - start).total_seconds(), 1.0)

    def X(t: dt.datetime) -> float:
        return ax0 + (ax1 - ax0) * min(max((t - start).total_seconds() / span, 0.0), 1.0)

    def Y(v: float) -> float:
        f = (math.log10(min(max(v, low), high)) - llo) / (lhi - llo)
        return ay0 + (ay1 - ay0) * f

    d.add(String(2, height_pt - 11, f"{data['tag']}: PFD(t) over the period", fontName=_FONT,
                 fontSize=9))
    # SIL bands, hatched, named at the right.
    for sil in (1, 2, 3, 4):
        lo, hi = calculations().sil_band(sil, "low")
        if hi <= low or lo >= high:
            continue
        yb, yt = Y(max(lo, low)), Y(min(hi, high))
        d.add(Rect(ax0, yb, ax1 - ax0, yt - yb, fillColor=_hex(BAND_GREY[sil]),
                   strokeColor=None, strokeWidth=0))
        d.add(_path(_hatch_lines(ax0, yb, ax1, yt, BAND_HATCH[sil]), _hex(_BAND_EDGE), 0.4))
        d.add(String(ax1 + 3, (yb + yt) / 2 - 3, f"SIL {sil}", fontName=_FONT, fontSize=7))
    # Grid and ticks: decades on the log axis, months on the time axis.
    for k in range(math.ceil(llo - 1e-9), math.floor(lhi + 1e-9) + 1):
        y = Y(10.0 ** k)
        d.add(Line(ax0, y, ax1, y, strokeColor=_hex(_GRID), strokeWidth=0.4,
                   strokeDashArray=[1, 1.5]))
        d.add(String(ax0 - 3, y - 2.5, f"{10.0 ** k:.0e}", fontName=_FONT, fontSize=6.5,
                     textAnchor="end"))
    for t in _month_ticks(start, end):
        x = X(t)
        d.add(Line(x, ay0, x, ay1, strokeColor=_hex(_GRID), strokeWidth=0.4,
                   strokeDashArray=[1, 1.5]))
        d.add(Line(x, ay0, x, ay0 - 2.5, strokeColor=colors.black, strokeWidth=0.5))
        d.add(String(x, ay0 - 10, t.strftime("%Y-%m"), fontName=_FONT, fontSize=6.5,
                     textAnchor="middle"))
    label = Group(String(0, 0, "PFD(t)", fontName=_FONT, fontSize=7, textAnchor="middle"))
    label.transform = (0, 1, -1, 0, 9, (ay0 + ay1) / 2)
    d.add(label)
    # Observed episodes: hatched bands from the possible onset to the restoration, and a
    # dotted line where each failure was found.
    drawn, found = 0, []
    for ep in data.get("episodes", []):
        lo_t, hi_t = max(_when(ep["onset_from"]), start), min(_when(ep["restored_at"]), end)
        if hi_t <= lo_t:
            continue
        x0, x1 = X(lo_t), X(hi_t)
        d.add(Rect(x0, ay0, max(x1 - x0, 0.3), ay1 - ay0, fillColor=_hex(EPISODE_FACE),
                   fillOpacity=0.75, strokeColor=_hex(EPISODE_EDGE), strokeWidth=0.6))
        d.add(_path(_hatch_lines(x0, ay0, x1, ay1, EPISODE_HATCH, step=2.5),
                    _hex(EPISODE_EDGE), 0.4))
        at = _when(ep["onset_to"])
        if lo_t <= at <= hi_t:
            found.append(at)
        drawn += 1
    if times:
        pts = []
        for t, v in zip(times, values, strict=True):
            pts += [X(t), Y(v)]
        d.add(PolyLine(pts, strokeColor=colors.black, strokeWidth=1.3))
    for at in found:
        x = X(at)
        d.add(Line(x, ay0, x, ay1, strokeColor=_hex(EPISODE_EDGE), strokeWidth=1.3,
                   strokeDashArray=[1, 1.5]))
    if target:
        y = Y(target)
        d.add(Line(ax0, y, ax1, y, strokeColor=colors.black, strokeWidth=1.4,
                   strokeDashArray=[4, 2]))
        text = f"target {target:.1e}"
        d.add(Rect(ax0 + 2, y + 1.5, 5.2 * len(text) * 0.75 + 3, 9, fillColor=colors.white,
                   strokeColor=None, strokeWidth=0))
        d.add(String(ax0 + 3.5, y + 3.5, text, fontName=_FONT, fontSize=7))
    # Legend, lower right, as the page's chart has it.
    entries = [("line", "PFD(t)")]
    if drawn:
        entries.append(("band", EPISODE_LABEL))
    if found:
        entries.append(("found", FOUND_LABEL))
    lw = 24 + max(len(text) for _, text in entries) * 3.6
    lh = 4 + 10 * len(entries)
    lx, ly = ax1 - lw - 4, ay0 + 4
    d.add(Rect(lx, ly, lw, lh, fillColor=colors.white, strokeColor=_hex("#cccccc"),
               strokeWidth=0.5))
    for i, (kind, text) in enumerate(entries):
        y = ly + lh - 8 - 10 * i
        if kind == "line":
            d.add(Line(lx + 4, y + 2, lx + 18, y + 2, strokeColor=colors.black, strokeWidth=1.3))
        elif kind == "band":
            d.add(Rect(lx + 4, y - 1, 14, 6, fillColor=_hex(EPISODE_FACE),
                       strokeColor=_hex(EPISODE_EDGE), strokeWidth=0.6))
            d.add(_path(_hatch_lines(lx + 4, y - 1, lx + 18, y + 5, EPISODE_HATCH, 2.5),
                        _hex(EPISODE_EDGE), 0.4))
        else:
            d.add(Line(lx + 4, y + 2, lx + 18, y + 2, strokeColor=_hex(EPISODE_EDGE),
                       strokeWidth=1.3, strokeDashArray=[1, 1.5]))
        d.add(String(lx + 22, y, text, fontName=_FONT, fontSize=6.5))
    d.add(Rect(ax0, ay0, ax1 - ax0, ay1 - ay0, fillColor=None, strokeColor=colors.black,
               strokeWidth=0.6))
    return d


# ---------------------------------------------------------------------------------------
# The PNG copy: the drawing's shapes rasterised with Pillow
# ---------------------------------------------------------------------------------------

_fonts: dict[float, object] = {}


def _font(size_px: float):
    from PIL import ImageFont

    from register.audit.evidence.pdf import FONT_DIR

    key = round(size_px, 1)
    if key not in _fonts:
        _fonts[key] = ImageFont.truetype(str(FONT_DIR / "DejaVuSans.ttf"), key)
    return _fonts[key]


def _rgba(colour, opacity=1.0):
    if colour is None:
        return None
    r, g, b = (round(255 * c) for c in colour.rgb())
    return (r, g, b, round(255 * opacity))


def _dashes(x0, y0, x1, y1, pattern):
    length = math.hypot(x1 - x0, y1 - y0)
    if length == 0:
        return []
    out, pos, i = [], 0.0, 0
    while pos < length:
        seg = pattern[i % len(pattern)]
        if i % 2 == 0:
            a, b = pos / length, min(pos + seg, length) / length
            out.append((x0 + (x1 - x0) * a, y0 + (y1 - y0) * a,
                        x0 + (x1 - x0) * b, y0 + (y1 - y0) * b))
        pos += seg
        i += 1
    return out


def png(d, dpi: int = PNG_DPI) -> bytes:
    """The drawing ``d`` (shapes as ``drawing`` makes them) as a PNG at ``dpi``."""
    from PIL import Image, ImageDraw
    from reportlab.graphics.shapes import Group, Line, Path, PolyLine, Rect, String

    s = dpi / 72.0
    w, h = round(d.width * s), round(d.height * s)
    img = Image.new("RGB", (w, h), "white")
    draw = ImageDraw.Draw(img)

    def P(x, y):
        return (x * s, (d.height - y) * s)

    def line(x0, y0, x1, y1, shape):
        width = max(1, round(shape.strokeWidth * s))
        colour = _rgba(shape.strokeColor)
        parts = ([(x0, y0, x1, y1)] if not shape.strokeDashArray else
                 _dashes(x0, y0, x1, y1, shape.strokeDashArray))
        for a, b, c, e in parts:
            draw.line([P(a, b), P(c, e)], fill=colour, width=width)

    def text(shape, rotated=None):
        font = _font(shape.fontSize * s)
        box = font.getbbox(shape.text)
        tw = box[2]
        if rotated is None:
            x = shape.x - {"start": 0, "middle": tw / s / 2, "end": tw / s}[shape.textAnchor]
            px, py = P(x, shape.y)
            draw.text((px, py), shape.text, fill="black", font=font, anchor="ls")
            return
        # A label turned a quarter to the left, centred on the transform's origin.
        tile = Image.new("RGBA", (tw + 4, int(font.size * 1.4)), (255, 255, 255, 0))
        ImageDraw.Draw(tile).text((2, 0), shape.text, fill="black", font=font)
        tile = tile.rotate(90, expand=True)
        cx, cy = P(rotated[4], rotated[5])
        img.paste(tile, (int(cx - tile.width / 2), int(cy - tile.height / 2)), tile)

    def walk(node):
        nonlocal draw
        for shape in node.contents:
            if isinstance(shape, Group):
                tr = getattr(shape, "transform", (1, 0, 0, 1, 0, 0))
                if tuple(tr[:4]) == (0, 1, -1, 0):
                    for child in shape.contents:
                        text(child, rotated=tr)
                else:
                    walk(shape)
            elif isinstance(shape, Rect):
                (x0, y0), (x1, y1) = P(shape.x, shape.y + shape.height), P(
                    shape.x + shape.width, shape.y)
                opacity = shape.fillOpacity if shape.fillOpacity is not None else 1.0
                if shape.fillColor is not None and opacity < 1:
                    layer = Image.new("RGBA", img.size, (0, 0, 0, 0))
                    ImageDraw.Draw(layer).rectangle([x0, y0, x1, y1],
                                                    fill=_rgba(shape.fillColor, opacity))
                    img.paste(Image.alpha_composite(img.convert("RGBA"), layer).convert("RGB"))
                    draw = ImageDraw.Draw(img)
                elif shape.fillColor is not None:
                    draw.rectangle([x0, y0, x1, y1], fill=_rgba(shape.fillColor))
                if shape.strokeColor is not None and shape.strokeWidth:
                    draw.rectangle([x0, y0, x1, y1], outline=_rgba(shape.strokeColor),
                                   width=max(1, round(shape.strokeWidth * s)))
            elif isinstance(shape, Line):
                line(shape.x1, shape.y1, shape.x2, shape.y2, shape)
            elif isinstance(shape, Path):
                pts = shape.points
                colour = _rgba(shape.strokeColor)
                width = max(1, round(shape.strokeWidth * s))
                for i in range(0, len(pts) - 3, 4):  # moveTo, lineTo pairs (see _path)
                    draw.line([P(pts[i], pts[i + 1]), P(pts[i + 2], pts[i + 3])],
                              fill=colour, width=width)
            elif isinstance(shape, PolyLine):
                pts = [P(shape.points[i], shape.points[i + 1])
                       for i in range(0, len(shape.points), 2)]
                if len(pts) >= 2:
                    draw.line(pts, fill=_rgba(shape.strokeColor),
                              width=max(1, round(shape.strokeWidth * s)), joint="curve")
            elif isinstance(shape, String):
                text(shape)

    walk(d)
    return _png_bytes(img)


def _png_bytes(img) -> bytes:
    """``img`` (RGB) as a PNG file: 8-bit RGB, rows unfiltered (filter type 0), zlib
    level 1. Pillow's writer tries every row filter on every row, most of the time of a
    chart; a chart is mostly flat colour, which compresses well unfiltered."""
    import struct
    import zlib

    import numpy as np

    w, h = img.size
    rows = np.zeros((h, 1 + 3 * w), dtype=np.uint8)  # a 0 (no filter) before each row
    rows[:, 1:] = np.asarray(img, dtype=np.uint8).reshape(h, 3 * w)

    def chunk(kind: bytes, data: bytes) -> bytes:
        return (struct.pack(">I", len(data)) + kind + data
                + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF))

    return (b"\x89PNG\r\n\x1a\n"
            + chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, 8, 2, 0, 0, 0))
            + chunk(b"IDAT", zlib.compress(rows.tobytes(), 1)) + chunk(b"IEND", b""))
