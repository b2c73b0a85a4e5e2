"""One self-contained HTML page describing a training run, with charts drawn as inline SVG.

The page loads nothing: no scripts, no style sheets or fonts from elsewhere, no images by address.
Every piece of text that comes from the run (title, options, field values) is escaped. Metric values
may be NaN or None (undefined metrics, or summaries read back from JSON); they show as "n/a" and
are left out of the charts.
"""

from __future__ import annotations

import html
import math
from pathlib import Path

from trainer.atomic import write_atomic
from trainer.errors import UserError
from trainer.run_folder import l2_label

_WIDTH = 540
_HEIGHT = 320
_PAD_LEFT = 70
_PAD_RIGHT = 18
_PAD_TOP = 34
_PAD_BOTTOM = 52
_BLUE = "#1f5f99"
_ORANGE = "#d0661a"
_GREY = "#8a8f98"
#: Colours of the passes in the L2 sweep chart, in pass order (then again).
_PASS_COLOURS = (_BLUE, _ORANGE, "#2e7d32", "#7b3fa0", "#8c564b", "#c2185b", "#00838f", "#5d6b00")
_PROBABILITY_AXES = ("auto", "linear", "log")
#: With ``probability_axis="auto"`` the reliability diagram is log-scaled below this base rate.
LOG_AXIS_BELOW_BASE_RATE = 0.1
#: Each 95% interval misses a calibrated bin's mean with probability 5%.
_MISS_RATE = 0.05

_CSS = """
body { font-family: sans-serif; color: #1d2330; background: #ffffff; margin: 24px 32px; }
h1 { font-size: 26px; margin: 0 0 4px 0; }
h2 { font-size: 19px; margin: 30px 0 10px 0; padding-bottom: 4px;
     border-bottom: 1px solid #d5d9e0; }
p.note { color: #505866; margin: 4px 0 10px 0; font-size: 14px; }
.cards { display: flex; flex-wrap: wrap; gap: 10px; margin-top: 14px; }
.card { border: 1px solid #d5d9e0; border-radius: 6px; padding: 8px 12px; min-width: 110px; }
.card .k { font-size: 12px; color: #505866; }
.card .v { font-size: 20px; font-weight: bold; }
.row { display: flex; flex-wrap: wrap; gap: 18px; align-items: flex-start; }
svg { border: 1px solid #e3e6eb; border-radius: 4px; background: #fbfcfd; }
table { border-collapse: collapse; font-size: 13px; }
th, td { border: 1px solid #d5d9e0; padding: 3px 8px; text-align: right; }
th { background: #eef1f5; }
td.t, th.t { text-align: left; }
p.verdict { font-size: 15px; margin: 10px 0 4px 0; padding: 8px 12px; background: #f3f5f8;
            border-left: 4px solid #1f5f99; }
.ok { color: #1e6b34; font-weight: bold; }
.bad { color: #b3261e; font-weight: bold; }
.unknown { color: #505866; font-weight: bold; }
"""


def _esc(value) -> str:
    return html.escape(str(value), quote=True)


def _num(value) -> float:
    """A float, NaN for None or anything not numeric."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return math.nan
    return float(value)


def _fmt(value, digits: int = 4) -> str:
    v = _num(value)
    if math.isnan(v):
        return "n/a"
    if isinstance(value, int):
        return f"{value:,}"
    return f"{v:.{digits}g}"


def _fmt_interval(lo, hi) -> str:
    if math.isnan(_num(lo)) or math.isnan(_num(hi)):
        return "n/a"
    return f"{_fmt(lo)} \u2013 {_fmt(hi)}"


def _fmt_rows(value: float) -> str:
    v = abs(value)
    for size, suffix in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if v >= size:
            return f"{value / size:.3g}{suffix}"
    return f"{value:.3g}"


def _nice_ticks(lo: float, hi: float, count: int = 5) -> list[float]:
    """Round tick values (1, 2 or 5 times a power of ten apart) covering [lo, hi]."""
    span = hi - lo
    mag = 10.0 ** math.floor(math.log10(span / max(count, 1)))
    step = min((m * mag for m in (1.0, 2.0, 5.0, 10.0)), key=lambda s: abs(span / s - count))
    first = math.ceil(lo / step - 1e-9)
    last = math.floor(hi / step + 1e-9)
    return [k * step for k in range(first, last + 1)]


def _domain(values: list[float], include_zero: bool = False) -> tuple[float, float]:
    lo, hi = min(values), max(values)
    if include_zero:
        lo = min(lo, 0.0)
    if hi - lo <= 1e-12 * max(abs(hi), 1.0):
        pad = max(abs(hi) * 0.05, 1e-3)
        return lo - pad, hi + pad
    pad = 0.06 * (hi - lo)
    return (lo if include_zero and lo == 0.0 else lo - pad), hi + pad


class _Plot:
    """Linear mapping from a data box to the drawing area of one SVG chart, and its parts."""

    def __init__(self, title: str, x_range, y_range, x_label: str, y_label: str):
        self.title = title
        self.x0, self.x1 = x_range
        self.y0, self.y1 = y_range
        self.x_label = x_label
        self.y_label = y_label
        self.parts: list[str] = []

    def px(self, x: float) -> float:
        return _PAD_LEFT + (x - self.x0) / (self.x1 - self.x0) * (_WIDTH - _PAD_LEFT - _PAD_RIGHT)

    def py(self, y: float) -> float:
        return _HEIGHT - _PAD_BOTTOM - (y - self.y0) / (self.y1 - self.y0) * (
            _HEIGHT - _PAD_TOP - _PAD_BOTTOM)

    def axes(self, x_ticks, y_ticks) -> None:
        """Grid lines, tick labels and axis titles; ticks are (value, label) pairs."""
        left, right = _PAD_LEFT, _WIDTH - _PAD_RIGHT
        top, bottom = _PAD_TOP, _HEIGHT - _PAD_BOTTOM
        for value, label in y_ticks:
            y = self.py(value)
            self.parts.append(f'<line x1="{left}" y1="{y:.1f}" x2="{right}" y2="{y:.1f}" '
                              f'stroke="#e1e5ea"/>')
            self.parts.append(f'<text x="{left - 6}" y="{y + 4:.1f}" text-anchor="end" '
                              f'font-size="11">{_esc(label)}</text>')
        for value, label in x_ticks:
            x = self.px(value)
            self.parts.append(f'<line x1="{x:.1f}" y1="{bottom}" x2="{x:.1f}" y2="{bottom + 5}" '
                              f'stroke="#555"/>')
            self.parts.append(f'<text x="{x:.1f}" y="{bottom + 18}" text-anchor="middle" '
                              f'font-size="11">{_esc(label)}</text>')
        self.parts.append(f'<rect x="{left}" y="{top}" width="{right - left}" '
                          f'height="{bottom - top}" fill="none" stroke="#555"/>')
        self.parts.append(f'<text x="{(left + right) / 2:.1f}" y="{_HEIGHT - 12}" '
                          f'text-anchor="middle" font-size="12">{_esc(self.x_label)}</text>')
        mid = (top + bottom) / 2
        self.parts.append(f'<text x="16" y="{mid:.1f}" text-anchor="middle" font-size="12" '
                          f'transform="rotate(-90 16 {mid:.1f})">{_esc(self.y_label)}</text>')

    def line(self, xs, ys, color: str, dashed: bool = False, markers: bool = True) -> None:
        points = " ".join(f"{self.px(x):.1f},{self.py(y):.1f}" for x, y in zip(xs, ys))
        dash = ' stroke-dasharray="6 4"' if dashed else ""
        self.parts.append(f'<polyline points="{points}" fill="none" stroke="{color}" '
                          f'stroke-width="2"{dash}/>')
        if markers:
            for x, y in zip(xs, ys):
                self.parts.append(f'<circle cx="{self.px(x):.1f}" cy="{self.py(y):.1f}" r="3.5" '
                                  f'fill="{color}"/>')

    def legend(self, entries) -> None:
        """Legend in the top margin: (label, colour, dashed) triples, left to right."""
        x = _PAD_LEFT
        for label, color, dashed in entries:
            dash = ' stroke-dasharray="6 4"' if dashed else ""
            self.parts.append(f'<line x1="{x}" y1="24" x2="{x + 22}" y2="24" stroke="{color}" '
                              f'stroke-width="3"{dash}/>')
            self.parts.append(f'<text x="{x + 28}" y="28" font-size="11">{_esc(label)}</text>')
            x += 40 + 6.5 * len(label)

    def svg(self) -> str:
        body = "".join(self.parts)
        return (f'<svg width="{_WIDTH}" height="{_HEIGHT}" viewBox="0 0 {_WIDTH} {_HEIGHT}" '
                f'role="img" aria-label="{_esc(self.title)}"><title>{_esc(self.title)}</title>'
                f'<text x="{_PAD_LEFT}" y="14" font-size="13" font-weight="bold">'
                f'{_esc(self.title)}</text>{body}</svg>')


def _empty_chart(title: str, message: str) -> str:
    return (f'<svg width="{_WIDTH}" height="{_HEIGHT}" viewBox="0 0 {_WIDTH} {_HEIGHT}" role="img" '
            f'aria-label="{_esc(title)}"><title>{_esc(title)}</title>'
            f'<text x="{_PAD_LEFT}" y="14" font-size="13" font-weight="bold">{_esc(title)}</text>'
            f'<text x="{_WIDTH / 2}" y="{_HEIGHT / 2}" text-anchor="middle" font-size="14" '
            f'fill="{_GREY}">{_esc(message)}</text></svg>')


def _finite_pairs(xs, ys):
    pairs = [(_num(x), _num(y)) for x, y in zip(xs, ys)]
    return [(x, y) for x, y in pairs if math.isfinite(x) and math.isfinite(y)]


def _per_pass_chart(title, y_label, series, fmt=_fmt, reference=None) -> str:
    """Values per pass; ``series`` holds (label, colour, dashed, [(pass, value), ...]).

    ``reference`` (label, value) draws a dashed grey line at that value, kept inside the y range.
    """
    series = [s for s in series if s[3]]
    if not series:
        return _empty_chart(title, "no holdout figures recorded")
    xs = [x for s in series for x, _ in s[3]]
    ys = [y for s in series for _, y in s[3]] + ([reference[1]] if reference else [])
    plot = _Plot(title, (min(xs) - 0.5, max(xs) + 0.5), _domain(ys), "pass", y_label)
    x_ticks = _nice_ticks(min(xs), max(xs), 8) if max(xs) > min(xs) else [min(xs)]
    plot.axes([(t, f"{t:g}") for t in x_ticks if t == int(t)],
              [(t, fmt(t)) for t in _nice_ticks(plot.y0, plot.y1)])
    legend = [(s[0], s[1], s[2]) for s in series]
    if reference:
        y = plot.py(reference[1])
        plot.parts.append(f'<line x1="{_PAD_LEFT}" y1="{y:.1f}" x2="{_WIDTH - _PAD_RIGHT}" '
                          f'y2="{y:.1f}" stroke="{_GREY}" stroke-width="1.5" '
                          'stroke-dasharray="6 4"/>')
        legend.append((reference[0], _GREY, True))
    for _, color, dashed, pts in series:
        plot.line([p[0] for p in pts], [p[1] for p in pts], color, dashed)
    if len(legend) > 1:
        plot.legend(legend)
    return plot.svg()


def _progress_chart(progress, loss_name: str) -> str:
    title = "Progressive validation loss"
    pts = _finite_pairs([p.get("rows") for p in progress], [p.get("loss") for p in progress])
    if not pts:
        return _empty_chart(title, "no progress recorded")
    xs = [p[0] for p in pts]
    ys = [p[1] for p in pts]
    x_hi = max(xs) if max(xs) > 0 else 1.0
    plot = _Plot(title, (0.0, x_hi * 1.02), _domain(ys), "rows trained on", loss_name)
    plot.axes([(t, _fmt_rows(t)) for t in _nice_ticks(0.0, x_hi, 6)],
              [(t, _fmt(t)) for t in _nice_ticks(plot.y0, plot.y1)])
    plot.line(xs, ys, _BLUE, markers=len(pts) <= 40)
    return plot.svg()


def _reliability_bins(bins) -> list[dict]:
    """The bins that hold weight and have a finite mean prediction and observed rate."""
    return [b for b in bins if _num(b.get("count")) > 0 and math.isfinite(_num(b.get(
        "mean_prediction"))) and math.isfinite(_num(b.get("observed_rate")))]


def _inside(b) -> bool | None:
    """Whether the bin's 95% interval contains its mean prediction; None without an interval."""
    lo, hi = _num(b.get("wilson_low")), _num(b.get("wilson_high"))
    mean = _num(b.get("mean_prediction"))
    if not (math.isfinite(lo) and math.isfinite(hi) and math.isfinite(mean)):
        return None
    return lo <= mean <= hi


def _log_ticks(lo: float, hi: float) -> list[float]:
    """Ticks 1, 2, 5 x 10^k inside [lo, hi] (powers of ten only beyond 2.5 decades)."""
    steps = (1.0,) if math.log10(hi / lo) > 2.5 else (1.0, 2.0, 5.0)
    ticks = []
    for k in range(math.floor(math.log10(lo)), math.ceil(math.log10(hi)) + 1):
        ticks += [m * 10.0 ** k for m in steps if lo <= m * 10.0 ** k <= hi]
    return ticks


def _reliability_chart(bins, log_axes: bool) -> str:
    scale = "log-scaled axes" if log_axes else "linear axes"
    title = f"Reliability: observed rate against prediction ({scale})"
    used = _reliability_bins(bins)
    if not used:
        return _empty_chart(title, "no holdout probabilities recorded")
    means = [_num(b["mean_prediction"]) for b in used]
    highs = [_num(b.get("wilson_high")) for b in used]
    tops = means + [h if math.isfinite(h) else _num(b["observed_rate"])
                    for h, b in zip(highs, used)]
    if log_axes:
        # The range covers the dots; an interval reaching lower is cut at the bottom edge.
        lows = [v for b in used for v in (_num(b["mean_prediction"]), _num(b["observed_rate"]))
                if v > 0]
        lo = max(min(lows) / 1.6, 1e-6) if lows else 1e-4
        hi = min(max(tops) * 1.25, 1.0)
        if hi <= lo * 1.5:
            hi = min(lo * 10.0, 1.0)
        fwd = math.log10
        plot = _Plot(title, (fwd(lo), fwd(hi)), (fwd(lo), fwd(hi)),
                     "mean predicted probability in bin", "observed rate in bin")
        ticks = [(fwd(t), _fmt(t, 3)) for t in _log_ticks(lo, hi)]
    else:
        lo = 0.0
        hi = next((c for c in (0.01, 0.02, 0.05, 0.1, 0.2, 0.3, 0.5, 0.7, 1.0)
                   if c >= max(tops) * 1.04), 1.0)

        def fwd(v):
            return v

        plot = _Plot(title, (0.0, hi), (0.0, hi), "mean predicted probability in bin",
                     "observed rate in bin")
        ticks = [(t, _fmt(t, 3)) for t in _nice_ticks(0.0, hi)]
    plot.axes(ticks, ticks)

    def y_of(v):
        return plot.py(fwd(max(v, lo)))

    plot.parts.append(f'<line x1="{plot.px(fwd(lo)):.1f}" y1="{plot.py(fwd(lo)):.1f}" '
                      f'x2="{plot.px(fwd(hi)):.1f}" y2="{plot.py(fwd(hi)):.1f}" stroke="{_GREY}" '
                      f'stroke-dasharray="6 4"/>')
    for b in used:
        mean, observed = _num(b["mean_prediction"]), _num(b["observed_rate"])
        if log_axes and mean <= 0:
            continue
        color = _ORANGE if _inside(b) is False else _BLUE
        x, y = plot.px(fwd(mean)), y_of(observed)
        lo_i, hi_i = _num(b.get("wilson_low")), _num(b.get("wilson_high"))
        if math.isfinite(lo_i) and math.isfinite(hi_i):
            y_lo, y_hi = y_of(lo_i), y_of(hi_i)
            plot.parts.append(f'<line x1="{x:.1f}" y1="{y_lo:.1f}" x2="{x:.1f}" y2="{y_hi:.1f}" '
                              f'stroke="{color}" stroke-width="1.5"/>')
            for end, yy in ((lo_i, y_lo), (hi_i, y_hi)):
                if end >= lo:
                    plot.parts.append(f'<line x1="{x - 4:.1f}" y1="{yy:.1f}" x2="{x + 4:.1f}" '
                                      f'y2="{yy:.1f}" stroke="{color}" stroke-width="1.5"/>')
        fill = "#ffffff" if log_axes and observed <= 0 else color
        plot.parts.append(f'<circle cx="{x:.1f}" cy="{y:.1f}" r="4.5" fill="{fill}" '
                          f'stroke="{color}" stroke-width="1.5"/>')
    plot.legend([("interval holds the mean", _BLUE, False), ("interval misses it", _ORANGE, False),
                 ("perfect calibration", _GREY, True)])
    return plot.svg()


def _logit(p: float) -> float:
    return math.log(p) - math.log1p(-p)


def _histogram_chart(hist) -> str:
    title = "Score distribution by class (share of each class)"
    edges = [_num(e) for e in hist.get("edges", [])]
    pos = [_num(v) for v in hist.get("positives", [])]
    neg = [_num(v) for v in hist.get("negatives", [])]
    n = len(pos)
    pos_total, neg_total = sum(pos), sum(neg)
    if n == 0 or len(edges) != n + 1 or pos_total + neg_total <= 0:
        return _empty_chart(title, "no holdout probabilities recorded")
    pos_share = [v / pos_total if pos_total > 0 else 0.0 for v in pos]
    neg_share = [v / neg_total if neg_total > 0 else 0.0 for v in neg]
    top = max(pos_share + neg_share)
    plot = _Plot(title, (0.0, float(n)), (0.0, top * 1.08), "predicted probability",
                 "share of the class's weight")
    # Bars sit at their bin number; a probability is placed by interpolating its log-odds between
    # the inner edges (which the accumulator spaces evenly in log-odds).
    inner = [(i, _logit(e)) for i, e in enumerate(edges) if 0.0 < e < 1.0]
    x_ticks = []
    if len(inner) >= 2:
        for p in (1e-4, 1e-3, 0.01, 0.1, 0.5, 0.9, 0.99, 0.999, 0.9999):
            z = _logit(p)
            for (i0, z0), (i1, z1) in zip(inner[:-1], inner[1:]):
                if z0 <= z <= z1:
                    x_ticks.append((i0 + (z - z0) / (z1 - z0) * (i1 - i0), f"{p:g}"))
                    break
    plot.axes(x_ticks, [(t, _fmt(t, 3)) for t in _nice_ticks(0.0, plot.y1)])
    width = (plot.px(1.0) - plot.px(0.0)) / 2.0
    for i in range(n):
        x = plot.px(float(i))
        for offset, share, color in ((0.0, pos_share[i], _ORANGE), (width, neg_share[i], _BLUE)):
            if share > 0:
                y = plot.py(share)
                plot.parts.append(f'<rect x="{x + offset + 0.5:.1f}" y="{y:.1f}" '
                                  f'width="{max(width - 1.0, 1.0):.1f}" '
                                  f'height="{plot.py(0.0) - y:.1f}" fill="{color}"/>')
    plot.legend([("positives", _ORANGE, False), ("negatives", _BLUE, False)])
    return plot.svg()


def _sweep_points(sweep, loss: str) -> dict:
    """{pass: [(l2 strength, holdout loss), ...]} of a sweep's records, finite losses only, by l2."""
    by_pass: dict = {}
    for p in sweep["points"]:
        value = _holdout_loss(_with_margin_figures(p.get("holdout")), loss)
        if math.isfinite(value) and math.isfinite(_num(p.get("l2_strength"))):
            by_pass.setdefault(p["pass"], []).append((p["l2_strength"], value))
    return {k: sorted(v) for k, v in sorted(by_pass.items())}


def _sweep_chart(sweep, loss: str) -> str:
    """Holdout loss against the L2 strength (log axis): one dot per value per pass, a line per pass,
    the kept value marked by a dashed vertical line."""
    loss_name = "log-loss" if loss == "logistic" else "squared hinge loss"
    title = f"Holdout {loss_name} against L2 strength"
    by_pass = {}
    for k, pts in _sweep_points(sweep, loss).items():
        if any(v > 0 for v, _ in pts):
            by_pass[k] = [(math.log10(v), y) for v, y in pts if v > 0]
    if not by_pass:
        return _empty_chart(title, "no holdout figures recorded")
    xs = sorted({x for pts in by_pass.values() for x, _ in pts})
    ys = [y for pts in by_pass.values() for _, y in pts]
    x_range = (xs[0] - 0.5, xs[-1] + 0.5) if len(xs) == 1 else _domain(xs)
    plot = _Plot(title, x_range, _domain(ys), "L2 strength (log scale)", loss_name)
    plot.axes([(x, l2_label(10.0 ** x)) for x in xs], [(t, _fmt(t)) for t in _nice_ticks(plot.y0, plot.y1)])
    kept = _num(sweep.get("kept"))
    if kept > 0:
        x = plot.px(math.log10(kept))
        plot.parts.append(f'<line x1="{x:.1f}" y1="{_PAD_TOP}" x2="{x:.1f}" y2="{_HEIGHT - _PAD_BOTTOM}" '
                          f'stroke="{_GREY}" stroke-width="1.5" stroke-dasharray="6 4"/>')
    legend = []
    for i, (k, pts) in enumerate(by_pass.items()):
        colour = _PASS_COLOURS[i % len(_PASS_COLOURS)]
        plot.line([x for x, _ in pts], [y for _, y in pts], colour)
        legend.append((f"pass {k}", colour, False))
    plot.legend(legend + ([("kept", _GREY, True)] if kept > 0 else []))
    return plot.svg()


def _sweep_table(sweep, loss: str) -> str:
    """A row per L2 strength: its holdout loss after each pass it ran, its best pass, and which is kept."""
    by_pass = _sweep_points(sweep, loss)
    passes = list(by_pass)
    values = sorted({v for pts in by_pass.values() for v, _ in pts})
    rows = []
    for v in values:
        losses = {k: y for k in passes for vv, y in by_pass[k] if vv == v}
        best = min(losses, key=losses.get)
        rows.append((l2_label(v), *(_fmt(losses[k], 5) if k in losses else "\u2013" for k in passes), best,
                     "kept" if v == sweep.get("kept") else ""))
    name = "log-loss" if loss == "logistic" else "squared hinge loss"
    return _table(["L2 strength", *(f"holdout {name}, pass {k}" for k in passes), "best pass", ""], rows,
                  text_cols=(len(passes) + 2,))


def _table(headers, rows, text_cols=()) -> str:
    head = "".join(f'<th class="t">{_esc(h)}</th>' if i in text_cols else f"<th>{_esc(h)}</th>"
                   for i, h in enumerate(headers))
    body = []
    for row in rows:
        cells = "".join(f'<td class="t">{_esc(c)}</td>' if i in text_cols else f"<td>{_esc(c)}</td>"
                        for i, c in enumerate(row))
        body.append(f"<tr>{cells}</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _cards(final: dict) -> str:
    items = [
        ("holdout rows", _fmt(final.get("rows"))),
        ("base rate", _fmt(final.get("base_rate"))),
        ("log-loss", _fmt(final.get("log_loss"))),
        ("normalized entropy", _fmt(final.get("normalized_entropy"))),
        ("AUC", _fmt(final.get("auc"))),
        ("Brier score", _fmt(final.get("brier"))),
        ("predicted / observed", _fmt(final.get("calibration_ratio"))),
        ("calibration error (ECE)", _fmt(final.get("ece"))),
        ("error rate at 0.5", _fmt(final.get("error_rate"))),
        ("error rate at base rate", _fmt(final.get("error_rate_at_base_rate"))),
    ]
    return '<div class="cards">' + "".join(
        f'<div class="card"><div class="k">{_esc(k)}</div><div class="v">{_esc(v)}</div></div>'
        for k, v in items) + "</div>"


def _auc_note(final: dict) -> str:
    """What the AUC's recorded bound means, in words ("" when there is none)."""
    bound = _num(final.get("auc_error_bound"))
    if not math.isfinite(_num(final.get("auc"))) or not math.isfinite(bound):
        return ""
    exact = ("it is exact for these scores" if bound == 0 else
             f"it is within {bound:.1g} of the exact AUC of these scores")
    return (f'<p class="note">The AUC is computed from a fine histogram of the scores; {exact}. '
            "That bound covers the histogram only, not sampling error: another holdout day would "
            "give a different AUC.</p>")


def _misses_allowed(n: int) -> int:
    """Smallest k with P(Binomial(n, 0.05) <= k) >= 0.95: the misses a calibrated model may show."""
    total = 0.0
    for k in range(n + 1):
        total += math.comb(n, k) * _MISS_RATE ** k * (1.0 - _MISS_RATE) ** (n - k)
        if total >= 0.95:
            return k
    return n


def _with_margin_figures(summary):
    """A holdout summary with the margin figures of a squared-hinge model (AUC, error rates, base
    rate) filled in where the summary has no probability figures of its own; None stays None."""
    if not summary or not isinstance(summary.get("margin"), dict):
        return summary
    return {**summary["margin"], **{k: v for k, v in summary.items() if k != "margin"}}


def _holdout_loss(summary, loss: str):
    summary = summary or {}
    return _num(summary.get("log_loss" if loss == "logistic" else "squared_hinge_loss"))


def _verdict(final: dict, passes, loss: str, best_pass) -> str:
    """The one-line verdict (base rate, calibration within intervals, last pass) and a line of
    the figures behind it."""
    parts = []
    ll, ne = _num(final.get("log_loss")), _num(final.get("normalized_entropy"))
    if math.isfinite(ll) and math.isfinite(ne) and ne > 0:
        head = f"than the base rate (normalized entropy {_fmt(ne, 3)})"
        detail = (f"holdout log-loss {_fmt(ll)} against {_fmt(ll / ne)} for always predicting the "
                  f"base rate, {100.0 * _num(final.get('base_rate')):.3g}%")
        parts.append(("ok", "Better " + head, detail) if ne < 1 else
                     ("bad", "Not better " + head, detail))
    else:
        parts.append(("unknown", "Base rate comparison n/a", "no holdout log-loss recorded"))
    inside = [_inside(b) for b in _reliability_bins(final.get("bins") or [])]
    checked = [i for i in inside if i is not None]
    if checked:
        held, allowed = checked.count(True), _misses_allowed(len(checked))
        head = f"calibrated within its intervals ({held} of {len(checked)} bins)"
        detail = (f"the mean prediction lies inside the bin's 95% interval in {held} of "
                  f"{len(checked)} bins; a calibrated model misses up to {allowed} by chance")
        parts.append(("ok", head.capitalize(), detail) if len(checked) - held <= allowed else
                     ("bad", "Not " + head, detail))
    else:
        parts.append(("unknown", "Calibration n/a", "no reliability bins recorded"))
    losses = [(p.get("pass"), _holdout_loss(p.get("holdout"), loss)) for p in passes]
    losses = [(k, v) for k, v in losses if math.isfinite(v)]
    name = "log-loss" if loss == "logistic" else "squared hinge loss"
    if len(losses) >= 2:
        (_, before), (last, after) = losses[-2], losses[-1]
        change = f"({100.0 * (after - before) / before:+.2g}%)"
        detail = f"pass {last} took the holdout {name} from {_fmt(before)} to {_fmt(after)}"
        if after < before:
            parts.append(("ok", f"Last pass improved the holdout {change}", detail))
        else:
            if best_pass not in (None, last):
                detail += f"; the weights of pass {best_pass} are kept"
            parts.append(("bad", f"Last pass did not improve the holdout {change}", detail))
    else:
        parts.append(("unknown", "Last-pass change n/a", "fewer than two passes with a holdout"))
    marks = {"ok": "\u2713", "bad": "\u2717", "unknown": "\u2013"}
    line = " \u00b7 ".join(f'<span class="{kind}">{marks[kind]} {_esc(head)}</span>'
                           for kind, head, _ in parts)
    details = "; ".join(detail for _, _, detail in parts)
    details = details[0].upper() + details[1:]
    return f'<p class="verdict">{line}</p><p class="note">{_esc(details)}.</p>'


#: What an option left unset (None) means, shown beside the value it resolved to.
_UNSET_MEANS = {"step0": "the solver's own", "start": "no limit, from the first day",
                "end": "no limit, to the last day", "holdout_start": "no limit",
                "holdout_end": "no limit"}


def _option_text(value) -> str:
    if isinstance(value, bool):
        return "on" if value else "off"
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        return repr(value)
    return str(value)


def _option_rows(options: dict, defaults: dict, resolved: dict) -> list[tuple[str, str]]:
    """(flag, value used) per option: "default" marks a default value, and an unset option shows
    what it resolved to (``resolved``) or what leaving it unset means."""
    rows = []
    for key, value in options.items():
        flag = "--" + str(key).replace("_", "-")
        if value is None:
            meaning = _UNSET_MEANS.get(key, "not set")
            used = resolved.get(key)
            text = (f"{_option_text(used)} (default: {meaning})" if used is not None else
                    f"default: {meaning}")
        else:
            text = _option_text(value)
            if key in defaults and defaults[key] == value:
                text += " (default)"
        rows.append((flag, text))
    return rows


def _weights_tables(top_weights) -> str:
    positive = sorted((t for t in top_weights if _num(t.get("weight")) > 0),
                      key=lambda t: -_num(t["weight"]))
    negative = sorted((t for t in top_weights if _num(t.get("weight")) < 0),
                      key=lambda t: _num(t["weight"]))
    parts = []
    for heading, group in (("Raise the prediction", positive), ("Lower the prediction", negative)):
        rows = [(t.get("bucket", ""), _fmt(t.get("weight")),
                 "; ".join(str(e) for e in t.get("examples", [])) or "(no example recorded)")
                for t in group]
        table = _table(["bucket", "weight", "field values seen in the bucket"], rows,
                       text_cols=(2,)) if rows else '<p class="note">none</p>'
        parts.append(f"<div><h3>{_esc(heading)}</h3>{table}</div>")
    return '<div class="row">' + "".join(parts) + "</div>"


def _sweep_section(sweep, loss: str) -> str:
    """The section of a run of several L2 strengths ("" for one)."""
    if not sweep:
        return ""
    values = {p.get("l2_strength") for p in sweep["points"]}
    return ("<section><h2>L2 strength</h2>"
            f'<p class="note">{_esc(len(values))} L2 strengths were trained from one read of the log; the '
            f"one with the lowest holdout loss, {_esc(l2_label(sweep['kept']))}, is kept, and the figures "
            "above and below are its own. Each dot is one value after one pass; the dashed line marks the "
            "kept value.</p>"
            f'<div class="row">{_sweep_chart(sweep, loss)}</div>'
            f'<div class="row" style="margin-top:18px">{_sweep_table(sweep, loss)}</div></section>')


def render_report(run: dict, probability_axis: str = "auto") -> str:
    """Render a training run as one self-contained HTML page.

    The page opens with a one-line verdict (better than the base rate by normalized entropy; calibrated
    when no more bins' 95% intervals miss their mean prediction than chance explains; whether the last
    pass lowered the holdout loss). Draws six SVG charts: holdout loss (the training loss), AUC and
    predicted / observed per pass, the progressive-validation curve, the reliability diagram with 95%
    Wilson intervals and the diagonal, and the score histograms by class; plus tables of figures per
    pass, reliability bins, largest weights and options. Undefined values (NaN or None) show as "n/a".
    A squared-hinge model's summaries without probability figures show the AUC and error rates of its
    margins (their ``margin`` part).

    Parameters
    ----------
    run : dict
        Keys ``title`` (str), ``options`` (dict of training options as recorded; None for an option
        left unset), ``passes`` (list of {"pass", "rows", "progressive_loss", "holdout": BinaryMetrics
        summary or None}), ``progress`` (list of {"rows", "loss"}: the progressive-validation curve, the
        method of the COLT 1999 paper below), ``final_holdout`` (a ``trainer.metrics.BinaryMetrics``
        summary, or None), ``top_weights`` (list of {"bucket", "weight", "examples": [str, ...]}) and
        ``loss`` ("logistic" or "squared-hinge"); optional ``option_defaults`` (dict: each option's
        default value), ``resolved_options`` (dict: the value an unset option resolved to, e.g. the
        solver's initial step), ``best_pass`` (the pass whose weights were kept) and, after several L2
        strengths (``trainer.sweep``), ``sweep``: {"kept": the value kept, "points": list of
        {"l2_strength", "pass", "holdout"}, one per value per pass}, drawn as a chart of holdout loss
        against L2 strength with a table of the same figures.
    probability_axis : {"auto", "linear", "log"}
        auto gives log-scaled axes when the final holdout's base rate is below
        :data:`LOG_AXIS_BELOW_BASE_RATE`: the equal-weight bins of a rare response sit at small
        probabilities, which a linear axis squeezes into its left edge.

    Returns
    -------
    str
        The HTML page.

    Raises
    ------
    KeyError
        When a required key is missing.
    ValueError
        For an unknown ``loss`` or ``probability_axis``.

    References
    ----------
    "Beating the hold-out: Bounds for k-fold and progressive cross-validation", COLT, 1999.
    "Probable Inference, the Law of Succession, and Statistical Inference", JASA, 1927.
    """
    loss = run["loss"]
    if loss not in ("logistic", "squared-hinge"):
        raise ValueError(f"render_report: loss must be 'logistic' or 'squared-hinge', got {loss!r}")
    if probability_axis not in _PROBABILITY_AXES:
        raise ValueError(f"render_report: probability_axis must be one of {_PROBABILITY_AXES}, "
                         f"got {probability_axis!r}")
    loss_name = "log-loss" if loss == "logistic" else "squared hinge loss"
    passes = [{**p, "holdout": _with_margin_figures(p.get("holdout"))} for p in run["passes"]]
    final = _with_margin_figures(run["final_holdout"]) or {}
    title = str(run["title"])
    best_pass = run.get("best_pass")
    base = _num(final.get("base_rate"))
    log_axes = probability_axis == "log" or (
        probability_axis == "auto" and math.isfinite(base) and 0 < base < LOG_AXIS_BELOW_BASE_RATE)

    def holdout_points(key):
        return _finite_pairs([p.get("pass") for p in passes],
                             [(p.get("holdout") or {}).get(key) for p in passes])

    loss_series = [
        (f"holdout {loss_name}", _BLUE, False, _finite_pairs(
            [p.get("pass") for p in passes],
            [_holdout_loss(p.get("holdout"), loss) for p in passes])),
        (f"progressive {loss_name} during the pass", _ORANGE, True, _finite_pairs(
            [p.get("pass") for p in passes], [p.get("progressive_loss") for p in passes]))]
    charts_pass = [
        _per_pass_chart(f"Holdout {loss_name} after each pass", loss_name, loss_series),
        _per_pass_chart("Holdout AUC after each pass", "AUC",
                        [("holdout AUC", _BLUE, False, holdout_points("auc"))]),
    ]
    ratio_chart = _per_pass_chart(
        "Holdout predicted / observed after each pass", "predicted / observed",
        [("holdout predicted / observed", _BLUE, False, holdout_points("calibration_ratio"))],
        reference=("calibrated (1.0)", 1.0))
    pass_rows = [(p.get("pass", ""), _fmt(p.get("rows")), _fmt(p.get("progressive_loss")),
                  _fmt(_holdout_loss(p.get("holdout"), loss)),
                  _fmt((p.get("holdout") or {}).get("normalized_entropy")),
                  _fmt((p.get("holdout") or {}).get("auc")),
                  _fmt((p.get("holdout") or {}).get("calibration_ratio"))) for p in passes]
    pass_table = _table(["pass", "rows", f"progressive {loss_name}", f"holdout {loss_name}",
                         "normalized entropy", "holdout AUC", "predicted / observed"], pass_rows)
    bins = final.get("bins") or []
    inside_text = {True: "yes", False: "no", None: "n/a"}
    bin_rows = [(f"{_fmt(b.get('lo'), 3)} \u2013 {_fmt(b.get('hi'), 3)}", _fmt(b.get("count")),
                 _fmt(b.get("mean_prediction")), _fmt(b.get("observed_rate")),
                 _fmt_interval(b.get("wilson_low"), b.get("wilson_high")),
                 _fmt(_num(b.get("mean_prediction")) / _num(b.get("observed_rate"))
                      if _num(b.get("observed_rate")) > 0 else math.nan, 3),
                 inside_text[_inside(b)]) for b in bins]
    bin_table = _table(["predictions in bin", "rows", "mean prediction", "observed rate",
                        "95% interval", "predicted / observed", "mean inside interval"], bin_rows,
                       text_cols=(0, 4))
    option_rows = _option_rows(run["options"], run.get("option_defaults") or {},
                               run.get("resolved_options") or {})
    calibration_note = (
        "Probabilities come from the logistic model directly." if loss == "logistic" else
        "The model was trained with the squared hinge loss; its margins were turned into "
        "probabilities by Platt scaling fitted on a calibration slice.")
    axis_note = (f"Both axes are log-scaled: the base rate is {_fmt(base, 3)}, so most bins sit at "
                 "small probabilities, and a constant ratio of predicted to observed is a constant "
                 "distance from the diagonal." if log_axes else "Both axes are linear.")
    if log_axes and any(_num(b["observed_rate"]) <= 0 for b in _reliability_bins(bins)):
        axis_note += " A bin without positives sits on the bottom edge as an open dot."
    bin_count = f" ({len(bins)} bins cut at quantiles of the prediction)" if bins else ""
    kept = (f"after pass {best_pass}, whose weights are kept" if best_pass is not None
            else "at the end")
    sections = [
        f"<header><h1>{_esc(title)}</h1>"
        f"{_verdict(final, passes, loss, best_pass)}"
        f'<p class="note">Training loss: {_esc(loss_name)}; {_esc(len(passes))} pass(es). '
        f"Figures below are measured on the holdout {_esc(kept)}.</p>{_cards(final)}"
        f"{_auc_note(final)}</header>",
        "<section><h2>Progress over the passes</h2>"
        f'<div class="row">{"".join(charts_pass)}</div>'
        f'<div class="row" style="margin-top:18px">{ratio_chart}'
        f'{_progress_chart(run["progress"], loss_name)}</div>'
        f'<div class="row" style="margin-top:18px">{pass_table}</div></section>',
        _sweep_section(run.get("sweep"), loss),
        "<section><h2>Calibration on the final holdout</h2>"
        f'<p class="note">{_esc(calibration_note)} Each dot is one bin of holdout rows of equal '
        f"weight{bin_count}, placed at its mean prediction and observed rate; bars show the 95% "
        f"Wilson interval of the observed rate. {_esc(axis_note)}</p>"
        f'<div class="row">{_reliability_chart(bins, log_axes)}'
        f'{_histogram_chart(final.get("histogram") or {})}</div>'
        f'<div class="row" style="margin-top:18px">{bin_table}</div></section>',
        "<section><h2>Largest weights</h2>"
        '<p class="note">Hashed buckets with the largest weights, and field values that were seen '
        "in them (several values can share a bucket).</p>"
        f'{_weights_tables(run["top_weights"])}</section>',
        "<section><h2>Training options</h2>"
        f'{_table(["option", "value used"], option_rows, (0, 1))}</section>',
    ]
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{_esc(title)}</title><style>{_CSS}</style></head><body>"
            + "".join(sections) + "</body></html>\n")


def write_report(run: dict, path, probability_axis: str = "auto") -> Path:
    """Render a run and write the page atomically.

    The page goes to a temporary file in the same folder, is flushed to disk, then renamed over ``path``
    with ``os.replace``, so a reader never sees a half-written report.

    Parameters
    ----------
    run : dict
        See :func:`render_report`.
    path : str or Path
        The HTML file.
    probability_axis : {"auto", "linear", "log"}
        See :func:`render_report`.

    Returns
    -------
    Path
        ``path``.

    Raises
    ------
    UserError
        When the folder does not exist.
    KeyError, ValueError
        As :func:`render_report`.
    """
    target = Path(path)
    folder = target.parent
    if not folder.is_dir():
        raise UserError(f"report path {str(target)!r}: folder {str(folder)!r} does not exist")
    write_atomic(target, [render_report(run, probability_axis).encode("utf-8")])
    return target
