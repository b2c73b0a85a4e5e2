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

_WIDTH = 540
_HEIGHT = 320
_PAD_LEFT = 70
_PAD_RIGHT = 18
_PAD_TOP = 34
_PAD_BOTTOM = 52
_BLUE = "#1f5f99"
_ORANGE = "#d0661a"
_GREY = "#8a8f98"

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


def _per_pass_chart(title, y_label, series, fmt=_fmt) -> str:
    """Values per pass; ``series`` holds (label, colour, dashed, [(pass, value), ...])."""
    series = [s for s in series if s[3]]
    if not series:
        return _empty_chart(title, "no holdout figures recorded")
    xs = [x for s in series for x, _ in s[3]]
    ys = [y for s in series for _, y in s[3]]
    plot = _Plot(title, (min(xs) - 0.5, max(xs) + 0.5), _domain(ys), "pass", y_label)
    x_ticks = _nice_ticks(min(xs), max(xs), 8) if max(xs) > min(xs) else [min(xs)]
    plot.axes([(t, f"{t:g}") for t in x_ticks if t == int(t)],
              [(t, fmt(t)) for t in _nice_ticks(plot.y0, plot.y1)])
    for _, color, dashed, pts in series:
        plot.line([p[0] for p in pts], [p[1] for p in pts], color, dashed)
    if len(series) > 1:
        plot.legend([(s[0], s[1], s[2]) for s in series])
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


def _reliability_chart(bins) -> str:
    title = "Reliability: observed rate against prediction"
    used = [b for b in bins if _num(b.get("count")) > 0 and math.isfinite(_num(b.get(
        "mean_prediction"))) and math.isfinite(_num(b.get("observed_rate")))]
    if not used:
        return _empty_chart(title, "no holdout rows")
    top = max(max(_num(b["mean_prediction"]), _num(b.get("wilson_high")) if math.isfinite(
        _num(b.get("wilson_high"))) else _num(b["observed_rate"])) for b in used)
    limit = next((c for c in (0.01, 0.02, 0.05, 0.1, 0.2, 0.3, 0.5, 0.7, 1.0) if c >= top * 1.04),
                 1.0)
    plot = _Plot(title, (0.0, limit), (0.0, limit), "mean predicted probability in bin",
                 "observed rate in bin")
    ticks = [(t, _fmt(t, 3)) for t in _nice_ticks(0.0, limit)]
    plot.axes(ticks, ticks)
    plot.parts.append(f'<line x1="{plot.px(0):.1f}" y1="{plot.py(0):.1f}" '
                      f'x2="{plot.px(limit):.1f}" y2="{plot.py(limit):.1f}" stroke="{_GREY}" '
                      f'stroke-dasharray="6 4"/>')
    total = sum(_num(b.get("weight", b["count"])) for b in used) or 1.0
    for b in used:
        x, y = plot.px(_num(b["mean_prediction"])), plot.py(_num(b["observed_rate"]))
        lo, hi = _num(b.get("wilson_low")), _num(b.get("wilson_high"))
        if math.isfinite(lo) and math.isfinite(hi):
            y_lo, y_hi = plot.py(lo), plot.py(hi)
            plot.parts.append(f'<line x1="{x:.1f}" y1="{y_lo:.1f}" x2="{x:.1f}" y2="{y_hi:.1f}" '
                              f'stroke="{_BLUE}" stroke-width="1.5"/>')
            for yy in (y_lo, y_hi):
                plot.parts.append(f'<line x1="{x - 5:.1f}" y1="{yy:.1f}" x2="{x + 5:.1f}" '
                                  f'y2="{yy:.1f}" stroke="{_BLUE}" stroke-width="1.5"/>')
        share = _num(b.get("weight", b["count"])) / total
        radius = 3.0 + 7.0 * math.sqrt(max(share, 0.0))
        plot.parts.append(f'<circle cx="{x:.1f}" cy="{y:.1f}" r="{radius:.1f}" fill="{_BLUE}" '
                          f'fill-opacity="0.75"/>')
    plot.legend([("observed rate, 95% Wilson interval", _BLUE, False),
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
        return _empty_chart(title, "no holdout rows")
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
    auc = _fmt(final.get("auc"))
    bound = _num(final.get("auc_error_bound"))
    if auc != "n/a" and math.isfinite(bound) and bound > 0:
        auc += f" \u00b1 {bound:.1g}"
    items = [
        ("holdout rows", _fmt(final.get("rows"))),
        ("base rate", _fmt(final.get("base_rate"))),
        ("log-loss", _fmt(final.get("log_loss"))),
        ("normalized entropy", _fmt(final.get("normalized_entropy"))),
        ("AUC", auc),
        ("Brier score", _fmt(final.get("brier"))),
        ("predicted / observed", _fmt(final.get("calibration_ratio"))),
        ("calibration error (ECE)", _fmt(final.get("ece"))),
        ("error rate at 0.5", _fmt(final.get("error_rate"))),
        ("error rate at base rate", _fmt(final.get("error_rate_at_base_rate"))),
    ]
    return '<div class="cards">' + "".join(
        f'<div class="card"><div class="k">{_esc(k)}</div><div class="v">{_esc(v)}</div></div>'
        for k, v in items) + "</div>"


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


def render_report(run: dict) -> str:
    """Render a training run as one self-contained HTML page (returned as a string).

    Takes ``run`` with keys ``title`` (str), ``options`` (dict of training options), ``passes``
    (list of {"pass", "rows", "progressive_loss", "holdout": BinaryMetrics summary or None}),
    ``progress`` (list of {"rows", "loss"}: the progressive-validation curve, the method of
    "Beating the hold-out: Bounds for k-fold and progressive cross-validation", COLT, 1999),
    ``final_holdout`` (a ``trainer.metrics.BinaryMetrics`` summary, or None), ``top_weights``
    (list of {"bucket", "weight", "examples": [str, ...]}) and ``loss`` ("logistic" or
    "squared-hinge"). Draws five
    SVG charts: holdout log-loss per pass, holdout AUC per pass, the progressive-validation curve,
    the reliability diagram with 95% Wilson intervals and the diagonal, and the score histograms by
    class; plus tables of figures per pass, reliability bins, largest weights and options.
    Undefined values (NaN or None) show as "n/a". Raises KeyError when a required key is missing
    and ValueError for an unknown ``loss``.
    """
    loss = run["loss"]
    if loss not in ("logistic", "squared-hinge"):
        raise ValueError(f"render_report: loss must be 'logistic' or 'squared-hinge', got {loss!r}")
    loss_name = "log-loss" if loss == "logistic" else "squared hinge loss"
    passes = run["passes"]
    final = run["final_holdout"] or {}
    title = str(run["title"])

    def holdout_points(key):
        return _finite_pairs([p.get("pass") for p in passes],
                             [(p.get("holdout") or {}).get(key) for p in passes])

    loss_series = [("holdout log-loss", _BLUE, False, holdout_points("log_loss"))]
    if loss == "logistic":
        loss_series.append(("progressive log-loss during the pass", _ORANGE, True, _finite_pairs(
            [p.get("pass") for p in passes], [p.get("progressive_loss") for p in passes])))
    charts_pass = [
        _per_pass_chart("Holdout log-loss after each pass", "log-loss", loss_series),
        _per_pass_chart("Holdout AUC after each pass", "AUC",
                        [("holdout AUC", _BLUE, False, holdout_points("auc"))]),
    ]
    pass_rows = [(p.get("pass", ""), _fmt(p.get("rows")), _fmt(p.get("progressive_loss")),
                  _fmt((p.get("holdout") or {}).get("log_loss")),
                  _fmt((p.get("holdout") or {}).get("auc"))) for p in passes]
    pass_table = _table(["pass", "rows", f"progressive {loss_name}", "holdout log-loss",
                         "holdout AUC"], pass_rows)
    bins = final.get("bins") or []
    bin_rows = [(f"{_fmt(b.get('lo'), 3)} \u2013 {_fmt(b.get('hi'), 3)}", _fmt(b.get("count")),
                 _fmt(b.get("mean_prediction")), _fmt(b.get("observed_rate")),
                 _fmt_interval(b.get("wilson_low"), b.get("wilson_high"))) for b in bins]
    bin_table = _table(["prediction range", "rows", "mean prediction", "observed rate",
                        "95% interval"], bin_rows, text_cols=(0, 4))
    option_rows = [(k, v if isinstance(v, str) else repr(v)) for k, v in run["options"].items()]
    calibration_note = (
        "Probabilities come from the logistic model directly." if loss == "logistic" else
        "The model was trained with the squared hinge loss; its margins were turned into "
        "probabilities by Platt scaling fitted on a calibration slice.")
    sections = [
        f"<header><h1>{_esc(title)}</h1>"
        f'<p class="note">Training loss: {_esc(loss_name)}; {_esc(len(passes))} pass(es). '
        f"Figures below are measured on the final holdout slice.</p>{_cards(final)}</header>",
        "<section><h2>Progress over the passes</h2>"
        f'<div class="row">{"".join(charts_pass)}</div>'
        f'<div class="row" style="margin-top:18px">{_progress_chart(run["progress"], loss_name)}'
        f"<div>{pass_table}</div></div></section>",
        "<section><h2>Calibration on the final holdout</h2>"
        f'<p class="note">{_esc(calibration_note)} Each dot is one prediction bin (dot area grows '
        "with its weight); bars show the 95% Wilson interval of the observed rate.</p>"
        f'<div class="row">{_reliability_chart(bins)}'
        f'{_histogram_chart(final.get("histogram") or {})}</div>'
        f'<div class="row" style="margin-top:18px">{bin_table}</div></section>',
        "<section><h2>Largest weights</h2>"
        '<p class="note">Hashed buckets with the largest weights, and field values that were seen '
        "in them (several values can share a bucket).</p>"
        f'{_weights_tables(run["top_weights"])}</section>',
        f'<section><h2>Training options</h2>{_table(["option", "value"], option_rows, (0, 1))}'
        "</section>",
    ]
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{_esc(title)}</title><style>{_CSS}</style></head><body>"
            + "".join(sections) + "</body></html>\n")


def write_report(run: dict, path) -> Path:
    """Render ``run`` (see :func:`render_report`) and write it to ``path`` atomically.

    The page goes to a temporary file in the same folder, is flushed to disk, then renamed over
    ``path`` with ``os.replace``, so a reader never sees a half-written report. Returns the path.
    Raises UserError when the folder does not exist, plus whatever :func:`render_report` raises.
    """
    target = Path(path)
    folder = target.parent
    if not folder.is_dir():
        raise UserError(f"report path {str(target)!r}: folder {str(folder)!r} does not exist")
    write_atomic(target, [render_report(run).encode("utf-8")])
    return target
