"""Inline SVG charts drawn by the server: an interval chart per metric, a stacked bar of arm shares
per cohort, a small bar for shares of members, and a guardrail's interval over time.

Every mark carries a text label, so the charts read without colour (and in black-and-white print);
shapes differ too (filled dot = projected lift, hollow diamond = corrected lift, dashed line = the
guardrail's limit, hatching = the harmful side of the limit). Only SVG presentation attributes are
used (no `style` attributes), so the page's Content-Security-Policy can forbid inline styles.

All functions return the SVG as `markupsafe.Markup` (the templates insert it as it is); every
value is put into the markup by `_m`, which escapes it, so nothing here escapes by hand. The numbers
they draw are passed in already in display units.

The module is longer than most (about 500 lines) because every mark is written out with its
attributes, one value per line; the four charts share its scale, text, line and pattern helpers,
so they stay together.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence

from markupsafe import Markup

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


def _m(template: str, /, **values: object) -> Markup:
    """`template` (trusted markup written here) with `values` filled in, each escaped by markupsafe
    (a plain string is escaped, a Markup value is kept): the charts' one way to put text in SVG."""
    return Markup(template).format(**values)


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


def _defs(uid: str) -> Markup:
    return _m(
        '<defs><pattern id="harm-{uid}" width="6" height="6" patternUnits="userSpaceOnUse" '
        'patternTransform="rotate(45)"><rect width="6" height="6" fill="#ffffff"/>'
        '<line x1="0" y1="0" x2="0" y2="6" stroke="#9a9a9a" stroke-width="2"/></pattern>'
        '<pattern id="hatch-arm-{uid}" width="5" height="5" patternUnits="userSpaceOnUse" '
        'patternTransform="rotate(-45)"><rect width="5" height="5" fill="#f2f2f2"/>'
        '<line x1="0" y1="0" x2="0" y2="5" stroke="#6b6b6b" stroke-width="1.5"/></pattern>'
        '<pattern id="dots-arm-{uid}" width="5" height="5" patternUnits="userSpaceOnUse">'
        '<rect width="5" height="5" fill="#a6c8cf"/><circle cx="2.5" cy="2.5" r="1" fill="#111111"/>'
        "</pattern></defs>",
        uid=uid,
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
) -> Markup:
    return _m(
        '<text x="{x}" y="{y}" text-anchor="{anchor}" font-size="{size}" '
        'font-weight="{weight}" fill="{fill}"{c}>{s}</text>',
        x=_n(x),
        y=_n(y),
        anchor=anchor,
        size=size,
        weight=weight,
        fill=fill,
        c=_m(' class="{cls}"', cls=cls) if cls else "",
        s=s,
    )


def _line(x1: float, y1: float, x2: float, y2: float, stroke: str, rest: str = "") -> Markup:
    """A straight SVG line; `rest` is further attributes, trusted markup written in this module."""
    return _m(
        '<line x1="{x1}" y1="{y1}" x2="{x2}" y2="{y2}" stroke="{stroke}"{rest}/>',
        x1=_n(x1),
        y1=_n(y1),
        x2=_n(x2),
        y2=_n(y2),
        stroke=stroke,
        rest=Markup(rest),
    )


def _clamp_anchor(x: float, left: float, right: float, margin: float = 60) -> str:
    if x - left < margin:
        return "start"
    if right - x < margin:
        return "end"
    return "middle"


def _chart_open(kind: str, *, width: int, height: float, uid: str, title: str) -> list[Markup]:
    """The opening tag of a scalable chart (its title labels it) and its fill patterns."""
    return [
        _m(
            '<svg xmlns="http://www.w3.org/2000/svg" class="chart {kind}" role="img" '
            'viewBox="0 0 {width} {height}" width="100%" preserveAspectRatio="xMinYMin meet" '
            'aria-labelledby="t-{uid}"><title id="t-{uid}">{title}</title>',
            kind=kind,
            width=width,
            height=height,
            uid=uid,
            title=title,
        ),
        _defs(uid),
    ]


def _harm_zone(uid: str, x0: float, y0: float, x1: float, y1: float, opacity: str) -> list[Markup]:
    """The hatched harmful side of a guardrail's limit, the box (x0, y0)-(x1, y1); none if empty."""
    if not (x1 > x0 and y1 > y0):
        return []
    return [
        _m(
            '<rect x="{x}" y="{y}" width="{w}" height="{h}" fill="url(#harm-{uid})" '
            'opacity="{opacity}"/>',
            x=_n(x0),
            y=_n(y0),
            w=_n(x1 - x0),
            h=_n(y1 - y0),
            uid=uid,
            opacity=opacity,
        )
    ]


def _limit_line(x1: float, y1: float, x2: float, y2: float, threshold: float) -> Markup:
    """A guardrail's limit: a dashed line carrying the exact threshold as data."""
    return _line(
        x1,
        y1,
        x2,
        y2,
        INK,
        _m(
            ' stroke-width="2" stroke-dasharray="5 3" class="limit" data-value="{v}"',
            v=repr(threshold),
        ),
    )


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
) -> Markup:
    """One metric's projected lift (dot), its interval (bar), the optimizer's-curse corrected lift
    (hollow diamond), zero (the baseline) and, for a guardrail, its limit as a dashed line with the
    harmful side hatched. `harmful` is 'above' (a lower-is-better metric must not rise past the
    limit) or 'below'. Values are in display units; `fmt` writes them."""
    left, right = 16.0, float(width - 16)
    values = [0.0, estimate, lower, upper] + [v for v in (corrected, threshold) if v is not None]
    values = [v for v in values if math.isfinite(v)]
    sx = Scale(min(values), max(values), left, right)
    y_bar, top, bottom = 52.0, 26.0, 78.0
    title = _interval_title(estimate, lower, upper, corrected, threshold, fmt)
    parts = _chart_open("interval", width=width, height=112, uid=uid, title=title)
    if threshold is not None and harmful in ("above", "below"):
        xt = sx(threshold)
        x0, x1 = (xt, right) if harmful == "above" else (left, xt)
        parts += _harm_zone(uid, x0, top, x1, bottom, "0.55")
    # axis with ticks at zero and the interval's ends
    parts.append(_line(left, bottom, right, bottom, RULE))
    x_zero = sx(0.0)
    parts.append(_line(x_zero, top, x_zero, bottom + 4, MUTED, ' stroke-width="1"'))
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
        parts.append(_limit_line(xt, top - 8, xt, bottom + 4, threshold))
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
        _line(
            xl,
            y_bar,
            xu,
            y_bar,
            ACCENT,
            _m(
                ' stroke-width="6" class="interval-bar" data-lower="{lo}" data-upper="{hi}"',
                lo=repr(lower),
                hi=repr(upper),
            ),
        )
    )
    for x in (xl, xu):
        parts.append(_line(x, y_bar - 9, x, y_bar + 9, ACCENT, ' stroke-width="2"'))
    # interval ends written outside the bar, unless that would leave the chart
    parts.append(
        _text(xl, y_bar + 22, fmt(lower), anchor="start" if xl - left < 64 else "end", size=11)
    )
    parts.append(
        _text(xu, y_bar + 22, fmt(upper), anchor="end" if right - xu < 64 else "start", size=11)
    )
    xe = sx(estimate)
    parts.append(
        _m(
            '<circle cx="{cx}" cy="{cy}" r="6" fill="{fill}" stroke="#ffffff" '
            'stroke-width="1.5" class="estimate" data-value="{v}"/>',
            cx=_n(xe),
            cy=_n(y_bar),
            fill=INK,
            v=repr(estimate),
        )
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
        path = f"M{_n(xc)} {_n(y_bar - d)} L{_n(xc + d)} {_n(y_bar)} L{_n(xc)} {_n(y_bar + d)} "
        path += f"L{_n(xc - d)} {_n(y_bar)} Z"
        parts.append(
            _m(
                '<path d="{path}" fill="#ffffff" stroke="{ink}" stroke-width="2" '
                'class="corrected" data-value="{v}"/>',
                path=path,
                ink=INK,
                v=repr(corrected),
            )
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
    parts.append(Markup("</svg>"))
    return Markup("").join(parts)


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
) -> Markup:
    """A stacked bar of arm shares (each in [0, 1], summing to 1). A segment wide enough carries
    'arm 62%'; every segment is also listed in the SVG title and in the page's text beside it."""
    parts = [
        _m(
            '<svg xmlns="http://www.w3.org/2000/svg" class="chart shares" role="img" '
            'viewBox="0 0 {width} {height}" width="{width}" height="{height}" '
            'aria-labelledby="t-{uid}"><title id="t-{uid}">{title}</title>',
            width=width,
            height=height,
            uid=uid,
            title=", ".join(f"{a} {pct(s)}" for a, s in segments if s > 0),
        ),
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
            _m(
                '<rect x="{x}" y="0" width="{w}" height="{height}" fill="{fill}" '
                'stroke="#ffffff" stroke-width="1" class="segment" data-arm="{arm}" '
                'data-share="{share}"/>',
                x=_n(x),
                w=_n(w),
                height=height,
                fill=fill,
                arm=arm,
                share=repr(share),
            )
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
                        _m(
                            '<rect x="{x}" y="{y}" width="{w}" height="16" fill="#ffffff"/>',
                            x=_n(x + w / 2 - tw / 2),
                            y=_n(height / 2 - 8),
                            w=_n(tw),
                        )
                    )
                parts.append(
                    _text(x + w / 2, height / 2 + 4, label, size=11, fill=bg, weight="bold")
                )
        x += w
    parts.append(
        _m(
            '<rect x="0.5" y="0.5" width="{w}" height="{h}" fill="none" stroke="{ink}"/></svg>',
            w=width - 1,
            h=height - 1,
            ink=INK,
        )
    )
    return Markup("").join(parts)


def size_bar(*, share: float, width: int = 90, height: int = 10) -> Markup:
    """A small horizontal bar for one share in [0, 1] (cohort size, share of members moved)."""
    w = max(0.0, min(1.0, share)) * width
    return _m(
        '<svg xmlns="http://www.w3.org/2000/svg" class="chart size" aria-hidden="true" '
        'viewBox="0 0 {width} {height}" width="{width}" height="{height}">'
        '<rect x="0.5" y="0.5" width="{w1}" height="{h1}" fill="#ffffff" stroke="{muted}"/>'
        '<rect x="0" y="0" width="{w}" height="{height}" fill="{accent}"/></svg>',
        width=width,
        height=height,
        w1=width - 1,
        h1=height - 1,
        muted=MUTED,
        w=_n(w),
        accent=ACCENT,
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
) -> Markup:
    """A guardrail's always-valid interval after each monitoring upload: one vertical bar per upload
    (lower..upper) with its estimate as a dot, the limit as a dashed horizontal line, upload numbers
    on the x axis and the last estimate written beside its dot."""
    pts = [
        h
        for h in history
        if all(math.isfinite(float(h.get(k, math.nan))) for k in ("estimate", "lower", "upper"))
    ]
    if not pts:
        return Markup('<p class="muted">No monitoring uploads with an estimate yet.</p>')
    left, right, top, bottom = 64.0, float(width - 90), 24.0, float(height - 34)
    ys = [0.0] + [float(p["lower"]) for p in pts] + [float(p["upper"]) for p in pts]
    if threshold is not None:
        ys.append(threshold)
    sy = Scale(min(ys), max(ys), bottom, top)
    n = len(pts)
    step = (right - left) / max(n, 1)
    title = (
        f"interval after each of {n} uploads; last {fmt(float(pts[-1]['lower']))} to "
        f"{fmt(float(pts[-1]['upper']))}"
    )
    parts = _chart_open("watch", width=width, height=height, uid=uid, title=title)
    if threshold is not None and harmful in ("above", "below"):
        yt = sy(threshold)
        y0, y1 = (top, yt) if harmful == "above" else (yt, bottom)
        parts += _harm_zone(uid, left, y0, right, y1, "0.45")
    y0 = sy(0.0)
    parts.append(_line(left, y0, right, y0, MUTED))
    parts.append(_text(left - 6, y0 + 4, "0", anchor="end", size=11, fill=MUTED))
    parts.append(_line(left, bottom, right, bottom, RULE))
    if threshold is not None:
        yt = sy(threshold)
        parts.append(_limit_line(left, yt, right, yt, threshold))
        parts.append(
            _text(
                right + 6, yt + 4, f"limit {fmt(threshold)}", anchor="start", size=11, weight="bold"
            )
        )
    every = max(1, math.ceil(n / 12))
    for i, p in enumerate(pts):
        x = left + step * (i + 0.5)
        lo, hi, est = sy(float(p["lower"])), sy(float(p["upper"])), sy(float(p["estimate"]))
        parts.append(_line(x, lo, x, hi, ACCENT, ' stroke-width="4" class="watch-interval"'))
        parts.append(
            _m('<circle cx="{cx}" cy="{cy}" r="3.5" fill="{ink}"/>', cx=_n(x), cy=_n(est), ink=INK)
        )
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
    parts.append(Markup("</svg>"))
    return Markup("").join(parts)


def pct(share: float, digits: int = 0) -> str:
    """0.625 -> '63%' (digits=0), '62.5%' (digits=1); tiny non-zero shares show as '<1%'."""
    if 0 < share < 0.005 and digits == 0:
        return "<1%"
    return f"{share * 100:.{digits}f}%"
