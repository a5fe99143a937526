"""Inline SVG charts drawn by the server: an interval chart per metric, a stacked bar of arm shares
per cohort, a small bar for shares of members, and a guardrail's interval over time.

Every mark carries a text label, so the charts read without colour (and in black-and-white print);
shapes differ too (filled dot = projected lift, hollow diamond = corrected lift, dashed line = the
guardrail's limit, hatching = the harmful side of the limit). Only SVG presentation attributes are
used (no `style` attributes), so the page's Content-Security-Policy can forbid inline styles.

All functions return an SVG string; the numbers they draw are passed in already in display units.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from html import escape

ACCENT = "#005f73"  # the one accent colour: intervals and the plan's own marks
INK = "#111111"
MUTED = "#595959"  # 7:1 on white
RULE = "#b8b8b8"
# arm segment fills: alternating dark/light so neighbours always differ in lightness; the arm's
# name is written on (or under) every segment, so the fills are a reading aid only
ARM_FILLS = ("#1b1b1b", "#d9d9d9", ACCENT, "#f2f2f2", "#5c5c5c", "#a6c8cf")
ARM_TEXT = ("#ffffff", "#111111", "#ffffff", "#111111", "#ffffff", "#111111")
ARM_PATTERN = (None, None, None, "hatch-arm", None, "dots-arm")

Fmt = Callable[[float], str]


def _e(s: object) -> str:
    return escape(str(s), quote=True)


def _n(x: float) -> str:
    """A coordinate with two decimals, trailing zeros removed."""
    return f"{x:.2f}".rstrip("0").rstrip(".")


class Scale:
    """Linear map from data [lo, hi] to pixels [p0, p1]; `nice` pads the domain by `pad` of its span."""

    def __init__(self, lo: float, hi: float, p0: float, p1: float, pad: float = 0.08) -> None:
        if not (math.isfinite(lo) and math.isfinite(hi)):
            raise ValueError(f"scale bounds must be finite, got {lo}, {hi}")
        if hi - lo < 1e-12:
            half = max(abs(lo) * 0.1, 1e-6)
            lo, hi = lo - half, hi + half
        span = hi - lo
        self.lo, self.hi = lo - pad * span, hi + pad * span
        self.p0, self.p1 = p0, p1

    def __call__(self, x: float) -> float:
        return self.p0 + (x - self.lo) / (self.hi - self.lo) * (self.p1 - self.p0)


def signed(x: float, digits: int = 3) -> str:
    """'+0.0213', '−0.4' (a real minus sign), '0' for zero; `digits` significant digits."""
    if x == 0 or not math.isfinite(x):
        return "0" if x == 0 else "n/a"
    mag = f"{abs(x):.{digits}g}"
    if "e" in mag:
        mag = f"{abs(x):.{digits + 3}f}".rstrip("0").rstrip(".")
    return ("+" if x > 0 else "\u2212") + mag


def _defs(uid: str) -> str:
    return (
        f'<defs><pattern id="harm-{uid}" width="6" height="6" patternUnits="userSpaceOnUse" '
        f'patternTransform="rotate(45)"><rect width="6" height="6" fill="#ffffff"/>'
        f'<line x1="0" y1="0" x2="0" y2="6" stroke="#9a9a9a" stroke-width="2"/></pattern>'
        f'<pattern id="hatch-arm-{uid}" width="5" height="5" patternUnits="userSpaceOnUse" '
        f'patternTransform="rotate(-45)"><rect width="5" height="5" fill="#f2f2f2"/>'
        f'<line x1="0" y1="0" x2="0" y2="5" stroke="#6b6b6b" stroke-width="1.5"/></pattern>'
        f'<pattern id="dots-arm-{uid}" width="5" height="5" patternUnits="userSpaceOnUse">'
        f'<rect width="5" height="5" fill="#a6c8cf"/><circle cx="2.5" cy="2.5" r="1" fill="#111111"/>'
        f"</pattern></defs>"
    )


def _text(
    x: float,
    y: float,
    s: str,
    *,
    anchor: str = "middle",
    size: int = 12,
    weight: str = "normal",
    fill: str = INK,
    cls: str | None = None,
) -> str:
    c = f' class="{cls}"' if cls else ""
    return (
        f'<text x="{_n(x)}" y="{_n(y)}" text-anchor="{anchor}" font-size="{size}" '
        f'font-weight="{weight}" fill="{fill}"{c}>{_e(s)}</text>'
    )


def _clamp_anchor(x: float, left: float, right: float, margin: float = 60) -> str:
    if x - left < margin:
        return "start"
    if right - x < margin:
        return "end"
    return "middle"


def interval_chart(
    *,
    uid: str,
    estimate: float,
    lower: float,
    upper: float,
    fmt: Fmt,
    corrected: float | None = None,
    threshold: float | None = None,
    harmful: str | None = None,
    width: int = 640,
) -> str:
    """One metric's projected lift (dot), its interval (bar), the optimizer's-curse corrected lift
    (hollow diamond), zero (the baseline) and, for a guardrail, its limit as a dashed line with the
    harmful side hatched. `harmful` is 'above' (a lower-is-better metric must not rise past the
    limit) or 'below'. Values are in display units; `fmt` writes them."""
    left, right = 16.0, float(width - 16)
    values = [0.0, estimate, lower, upper] + [v for v in (corrected, threshold) if v is not None]
    values = [v for v in values if math.isfinite(v)]
    sx = Scale(min(values), max(values), left, right)
    y_bar, top, bottom = 52.0, 26.0, 78.0
    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" class="chart interval" role="img" '
        f'viewBox="0 0 {width} 112" width="100%" preserveAspectRatio="xMinYMin meet" '
        f'aria-labelledby="t-{uid}">',
        f'<title id="t-{uid}">',
        _e(_interval_title(estimate, lower, upper, corrected, threshold, fmt)),
        "</title>",
        _defs(uid),
    ]
    if threshold is not None and harmful in ("above", "below"):
        xt = sx(threshold)
        x0, x1 = (xt, right) if harmful == "above" else (left, xt)
        if x1 > x0:
            parts.append(
                f'<rect x="{_n(x0)}" y="{_n(top)}" width="{_n(x1 - x0)}" height="{_n(bottom - top)}" '
                f'fill="url(#harm-{uid})" opacity="0.55"/>'
            )
    # axis with ticks at zero and the interval's ends
    parts.append(
        f'<line x1="{_n(left)}" y1="{_n(bottom)}" x2="{_n(right)}" y2="{_n(bottom)}" stroke="{RULE}"/>'
    )
    x_zero = sx(0.0)
    parts.append(
        f'<line x1="{_n(x_zero)}" y1="{_n(top)}" x2="{_n(x_zero)}" y2="{_n(bottom + 4)}" '
        f'stroke="{MUTED}" stroke-width="1"/>'
    )
    parts.append(
        _text(
            x_zero,
            bottom + 17,
            "0 = baseline",
            anchor=_clamp_anchor(x_zero, left, right),
            size=11,
            fill=MUTED,
        )
    )
    if threshold is not None:
        xt = sx(threshold)
        parts.append(
            f'<line x1="{_n(xt)}" y1="{_n(top - 8)}" x2="{_n(xt)}" y2="{_n(bottom + 4)}" '
            f'stroke="{INK}" stroke-width="2" stroke-dasharray="5 3" class="limit" '
            f'data-value="{threshold!r}"/>'
        )
        parts.append(
            _text(
                xt,
                top - 12,
                f"limit {fmt(threshold)}",
                anchor=_clamp_anchor(xt, left, right),
                size=12,
                weight="bold",
            )
        )
    xl, xu = sx(lower), sx(upper)
    parts.append(
        f'<line x1="{_n(xl)}" y1="{_n(y_bar)}" x2="{_n(xu)}" y2="{_n(y_bar)}" stroke="{ACCENT}" '
        f'stroke-width="6" class="interval-bar" data-lower="{lower!r}" data-upper="{upper!r}"/>'
    )
    for x in (xl, xu):
        parts.append(
            f'<line x1="{_n(x)}" y1="{_n(y_bar - 9)}" x2="{_n(x)}" y2="{_n(y_bar + 9)}" '
            f'stroke="{ACCENT}" stroke-width="2"/>'
        )
    # interval ends written outside the bar, unless that would leave the chart
    parts.append(
        _text(xl, y_bar + 22, fmt(lower), anchor="start" if xl - left < 64 else "end", size=11)
    )
    parts.append(
        _text(xu, y_bar + 22, fmt(upper), anchor="end" if right - xu < 64 else "start", size=11)
    )
    xe = sx(estimate)
    parts.append(
        f'<circle cx="{_n(xe)}" cy="{_n(y_bar)}" r="6" fill="{INK}" stroke="#ffffff" '
        f'stroke-width="1.5" class="estimate" data-value="{estimate!r}"/>'
    )
    label_y = y_bar - 13
    parts.append(
        _text(
            xe,
            label_y,
            f"projected {fmt(estimate)}",
            anchor=_clamp_anchor(xe, left, right),
            weight="bold",
        )
    )
    if corrected is not None and math.isfinite(corrected):
        xc = sx(corrected)
        d = 6.0
        parts.append(
            f'<path d="M{_n(xc)} {_n(y_bar - d)} L{_n(xc + d)} {_n(y_bar)} L{_n(xc)} {_n(y_bar + d)} '
            f'L{_n(xc - d)} {_n(y_bar)} Z" fill="#ffffff" stroke="{INK}" stroke-width="2" '
            f'class="corrected" data-value="{corrected!r}"/>'
        )
        parts.append(
            _text(
                xc,
                bottom + 30,
                f"\u25c7 corrected {fmt(corrected)}",
                anchor=_clamp_anchor(xc, left, right),
                size=11,
            )
        )
    parts.append("</svg>")
    return "".join(parts)


def _interval_title(
    estimate: float,
    lower: float,
    upper: float,
    corrected: float | None,
    threshold: float | None,
    fmt: Fmt,
) -> str:
    s = f"projected lift {fmt(estimate)}, interval {fmt(lower)} to {fmt(upper)}"
    if corrected is not None:
        s += f", corrected {fmt(corrected)}"
    if threshold is not None:
        s += f", limit {fmt(threshold)}"
    return s


def share_bar(
    *,
    uid: str,
    segments: Sequence[tuple[str, float]],
    width: int = 420,
    height: int = 26,
    min_label_px: float = 34,
) -> str:
    """A stacked bar of arm shares (each in [0, 1], summing to 1). A segment wide enough carries
    'arm 62%'; every segment is also listed in the SVG title and in the page's text beside it."""
    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" class="chart shares" role="img" '
        f'viewBox="0 0 {width} {height}" width="{width}" height="{height}" aria-labelledby="t-{uid}">',
        f'<title id="t-{uid}">',
        _e(", ".join(f"{a} {pct(s)}" for a, s in segments if s > 0)),
        "</title>",
        _defs(uid),
    ]
    x = 0.0
    for j, (arm, share) in enumerate(segments):
        w = max(share, 0.0) * width
        if w <= 0:
            continue
        k = j % len(ARM_FILLS)
        fill = f"url(#{ARM_PATTERN[k]}-{uid})" if ARM_PATTERN[k] else ARM_FILLS[k]
        parts.append(
            f'<rect x="{_n(x)}" y="0" width="{_n(w)}" height="{height}" fill="{fill}" '
            f'stroke="#ffffff" stroke-width="1" class="segment" data-arm="{_e(arm)}" '
            f'data-share="{share!r}"/>'
        )
        if w >= min_label_px:
            label = f"{arm} {pct(share)}"
            if len(label) * 6.6 > w - 6:
                label = pct(share)
            if len(label) * 6.6 <= w - 4:
                bg = ARM_TEXT[k] if not ARM_PATTERN[k] else INK
                if ARM_PATTERN[k]:  # a white plate keeps text readable over hatching
                    tw = len(label) * 6.6 + 6
                    parts.append(
                        f'<rect x="{_n(x + w / 2 - tw / 2)}" y="{_n(height / 2 - 8)}" width="{_n(tw)}" '
                        f'height="16" fill="#ffffff"/>'
                    )
                parts.append(
                    _text(x + w / 2, height / 2 + 4, label, size=11, fill=bg, weight="bold")
                )
        x += w
    parts.append(
        f'<rect x="0.5" y="0.5" width="{width - 1}" height="{height - 1}" fill="none" stroke="{INK}"/>'
    )
    parts.append("</svg>")
    return "".join(parts)


def size_bar(*, share: float, width: int = 90, height: int = 10) -> str:
    """A small horizontal bar for one share in [0, 1] (cohort size, share of members moved)."""
    w = max(0.0, min(1.0, share)) * width
    return (
        f'<svg xmlns="http://www.w3.org/2000/svg" class="chart size" aria-hidden="true" '
        f'viewBox="0 0 {width} {height}" width="{width}" height="{height}">'
        f'<rect x="0.5" y="0.5" width="{width - 1}" height="{height - 1}" fill="#ffffff" stroke="{MUTED}"/>'
        f'<rect x="0" y="0" width="{_n(w)}" height="{height}" fill="{ACCENT}"/></svg>'
    )


def watch_chart(
    *,
    uid: str,
    history: Sequence[dict[str, float]],
    threshold: float | None,
    fmt: Fmt,
    harmful: str | None = None,
    width: int = 640,
    height: int = 190,
) -> str:
    """A guardrail's always-valid interval after each monitoring upload: one vertical bar per upload
    (lower..upper) with its estimate as a dot, the limit as a dashed horizontal line, upload numbers
    on the x axis and the last estimate written beside its dot."""
    pts = [
        h
        for h in history
        if all(math.isfinite(float(h.get(k, math.nan))) for k in ("estimate", "lower", "upper"))
    ]
    if not pts:
        return '<p class="muted">No monitoring uploads with an estimate yet.</p>'
    left, right, top, bottom = 64.0, float(width - 90), 24.0, float(height - 34)
    ys = [0.0] + [float(p["lower"]) for p in pts] + [float(p["upper"]) for p in pts]
    if threshold is not None:
        ys.append(threshold)
    sy = Scale(min(ys), max(ys), bottom, top)
    n = len(pts)
    step = (right - left) / max(n, 1)
    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" class="chart watch" role="img" '
        f'viewBox="0 0 {width} {height}" width="100%" preserveAspectRatio="xMinYMin meet" '
        f'aria-labelledby="t-{uid}">',
        f'<title id="t-{uid}">',
        _e(
            f"interval after each of {n} uploads; last {fmt(float(pts[-1]['lower']))} to "
            f"{fmt(float(pts[-1]['upper']))}"
        ),
        "</title>",
        _defs(uid),
    ]
    if threshold is not None and harmful in ("above", "below"):
        yt = sy(threshold)
        y0, y1 = (top, yt) if harmful == "above" else (yt, bottom)
        if y1 > y0:
            parts.append(
                f'<rect x="{_n(left)}" y="{_n(y0)}" width="{_n(right - left)}" height="{_n(y1 - y0)}" '
                f'fill="url(#harm-{uid})" opacity="0.45"/>'
            )
    y0 = sy(0.0)
    parts.append(
        f'<line x1="{_n(left)}" y1="{_n(y0)}" x2="{_n(right)}" y2="{_n(y0)}" stroke="{MUTED}"/>'
    )
    parts.append(_text(left - 6, y0 + 4, "0", anchor="end", size=11, fill=MUTED))
    parts.append(
        f'<line x1="{_n(left)}" y1="{_n(bottom)}" x2="{_n(right)}" y2="{_n(bottom)}" stroke="{RULE}"/>'
    )
    if threshold is not None:
        yt = sy(threshold)
        parts.append(
            f'<line x1="{_n(left)}" y1="{_n(yt)}" x2="{_n(right)}" y2="{_n(yt)}" stroke="{INK}" '
            f'stroke-width="2" stroke-dasharray="5 3" class="limit" data-value="{threshold!r}"/>'
        )
        parts.append(
            _text(
                right + 6, yt + 4, f"limit {fmt(threshold)}", anchor="start", size=11, weight="bold"
            )
        )
    every = max(1, math.ceil(n / 12))
    for i, p in enumerate(pts):
        x = left + step * (i + 0.5)
        lo, hi, est = sy(float(p["lower"])), sy(float(p["upper"])), sy(float(p["estimate"]))
        parts.append(
            f'<line x1="{_n(x)}" y1="{_n(lo)}" x2="{_n(x)}" y2="{_n(hi)}" stroke="{ACCENT}" '
            f'stroke-width="4" class="watch-interval"/>'
        )
        parts.append(f'<circle cx="{_n(x)}" cy="{_n(est)}" r="3.5" fill="{INK}"/>')
        if i % every == 0 or i == n - 1:
            parts.append(_text(x, bottom + 15, f"#{p.get('upload', i + 1)}", size=11, fill=MUTED))
    last = pts[-1]
    parts.append(
        _text(
            left + step * (n - 0.5) + 8,
            sy(float(last["estimate"])) + 4,
            fmt(float(last["estimate"])),
            anchor="start",
            size=11,
            weight="bold",
        )
    )
    parts.append(_text((left + right) / 2, height - 4, "monitoring upload", size=11, fill=MUTED))
    parts.append("</svg>")
    return "".join(parts)


def pct(share: float, digits: int = 0) -> str:
    """0.625 -> '63%' (digits=0), '62.5%' (digits=1); tiny non-zero shares show as '<1%'."""
    if 0 < share < 0.005 and digits == 0:
        return "<1%"
    return f"{share * 100:.{digits}f}%"
