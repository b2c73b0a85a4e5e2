"""Checks of trainer.report: structure (html.parser), escaping, atomic write, browser render."""

import html
import importlib.util
import math
import re
import struct
import zlib
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from numba import njit
from scipy.stats import binom
from sklearn.metrics import log_loss, roc_auc_score
from statsmodels.stats.proportion import proportion_confint

from trainer.errors import UserError
from trainer.metrics import BinaryMetrics, MarginMetrics
from trainer.report import render_report, write_report
from trainer.training import TrainOptions

SCRIPT = Path(__file__).resolve().parents[1] / "scripts" / "render_report_png.py"
N_CHARTS = 6
GREEN = (0x1E, 0x6B, 0x34)
RED = (0xB3, 0x26, 0x1E)
BLUE = (0x1F, 0x5F, 0x99)
ORANGE = (0xD0, 0x66, 0x1A)


def _load_script():
    spec = importlib.util.spec_from_file_location("render_report_png", SCRIPT)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@njit(cache=True)
def _unfilter(raw, height, stride, bpp):
    """Undo the per-scanline filters (types 0-4) of 8-bit PNG samples (PNG specification,
    ISO/IEC 15948:2004, from memory)."""
    out = np.zeros((height, stride), np.uint8)
    pos = 0
    for r in range(height):
        kind = raw[pos]
        pos += 1
        for c in range(stride):
            x = np.int64(raw[pos + c])
            a = np.int64(out[r, c - bpp]) if c >= bpp else 0
            b = np.int64(out[r - 1, c]) if r > 0 else 0
            d = np.int64(out[r - 1, c - bpp]) if (r > 0 and c >= bpp) else 0
            if kind == 1:
                x += a
            elif kind == 2:
                x += b
            elif kind == 3:
                x += (a + b) // 2
            elif kind == 4:
                p = a + b - d
                pa, pb, pc = abs(p - a), abs(p - b), abs(p - d)
                if pa <= pb and pa <= pc:
                    x += a
                elif pb <= pc:
                    x += b
                else:
                    x += d
            out[r, c] = x & 255
        pos += stride
    return out


def decode_png(path):
    """(height, width, channels) uint8 pixels of a non-interlaced 8-bit RGB or RGBA PNG."""
    data = Path(path).read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    pos, idat, header = 8, [], None
    while pos < len(data):
        length, kind = struct.unpack(">I4s", data[pos:pos + 8])
        chunk = data[pos + 8:pos + 8 + length]
        pos += 12 + length
        if kind == b"IHDR":
            header = struct.unpack(">IIBBBBB", chunk)
        elif kind == b"IDAT":
            idat.append(chunk)
    width, height, depth, colour, _, _, interlace = header
    assert depth == 8 and colour in (2, 6) and interlace == 0
    channels = 3 if colour == 2 else 4
    raw = np.frombuffer(zlib.decompress(b"".join(idat)), np.uint8)
    assert raw.size == height * (width * channels + 1)
    return _unfilter(raw, height, width * channels, channels).reshape(height, width, channels)


class Collect(HTMLParser):
    """Every start tag with its attributes, and all text, as read by the standard library parser."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags = []
        self.text = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_startendtag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def parse(page):
    parser = Collect()
    parser.feed(page)
    parser.close()
    return parser


def scored(seed, n=4000, single_class=False, centre=-1.5, overshoot=1.0):
    """(labels, predictions, weights): labels drawn from p, predictions p * overshoot (max 1)."""
    rng = np.random.default_rng(seed)
    p = 1 / (1 + np.exp(-rng.normal(centre, 1.3, n)))
    y = np.zeros(n) if single_class else (rng.random(n) < p).astype(float)
    return y, np.minimum(p * overshoot, 1.0), rng.uniform(0.5, 2.0, n)


def holdout(seed, **kwargs):
    acc = BinaryMetrics()
    acc.update(*scored(seed, **kwargs))
    return acc.summary()


def make_run(loss="logistic", title="Run of 2026-03-04", examples=("shop=shop-3",), centre=-1.5):
    passes = [{"pass": k, "rows": 3000 * k, "progressive_loss": 0.5 - 0.03 * k,
               "holdout": holdout(k, centre=centre)} for k in (1, 2, 3)]
    return {
        "title": title,
        "options": {"epochs": 3, "l2_strength": 1e-6, "step0": None, "start": None,
                    "holdout": "day >= 2026-03-03"},
        "option_defaults": TrainOptions().as_json(),
        "resolved_options": {"step0": 0.3},
        "best_pass": 3,
        "passes": passes,
        "progress": [{"rows": r, "loss": 0.4 + 0.3 / (1 + r / 500)} for r in range(100, 9001, 100)],
        "final_holdout": passes[-1]["holdout"],
        "top_weights": [{"bucket": 17, "weight": 1.25, "examples": list(examples)},
                        {"bucket": 4096, "weight": -0.75, "examples": []}],
        "loss": loss,
    }


def nan_to_none(value):
    """What a summary looks like after a JSON round trip that stores undefined metrics as null."""
    if isinstance(value, dict):
        return {k: nan_to_none(v) for k, v in value.items()}
    if isinstance(value, list):
        return [nan_to_none(v) for v in value]
    if isinstance(value, float) and math.isnan(value):
        return None
    return value


def test_page_parses_with_one_svg_per_chart_and_nothing_external():
    page = render_report(make_run())
    doc = parse(page)
    names = [t for t, _ in doc.tags]
    # Reference: html.parser from the standard library; five charts were asked for.
    assert names.count("svg") == N_CHARTS
    assert not {"script", "link", "img", "iframe", "object", "embed"} & set(names)
    assert all(not {"src", "href"} & set(attrs) for _, attrs in doc.tags)
    assert "http" not in page.lower() and "@import" not in page and "url(" not in page


def test_all_text_is_escaped():
    hostile = "<script>alert('x')</script> & <b>bold</b>"
    run = make_run(title=hostile, examples=(hostile, "tags=t1 \u00d7 age_days=#2"))
    run["options"]["note"] = hostile
    page = render_report(run)
    doc = parse(page)
    names = [t for t, _ in doc.tags]
    # Reference: html.parser sees the hostile strings as text, never as tags (common practice).
    assert "script" not in names and "b" not in names
    assert "".join(doc.text).count(hostile) >= 3
    assert "&lt;script&gt;" in page


def test_undefined_values_render_as_text():
    run = make_run()
    run["passes"][0]["holdout"] = None
    run["final_holdout"] = holdout(9, single_class=True)
    page = render_report(run)
    text = "".join(parse(page).text)
    # Reference: the single-class summary has NaN AUC (trainer.metrics docstring); shown as "n/a".
    assert math.isnan(run["final_holdout"]["auc"]) and "n/a" in text
    assert [t for t, _ in parse(page).tags].count("svg") == N_CHARTS
    json_like = nan_to_none(run)
    assert [t for t, _ in parse(render_report(json_like)).tags].count("svg") == N_CHARTS


def test_empty_run_still_draws_every_chart():
    run = make_run()
    run.update(passes=[], progress=[], final_holdout=None, top_weights=[])
    doc = parse(render_report(run))
    # Reference: the brief asks for one <svg> per chart; empty charts say so in text.
    assert [t for t, _ in doc.tags].count("svg") == N_CHARTS
    assert "no holdout probabilities recorded" in "".join(doc.text)


def test_squared_hinge_run_mentions_platt_scaling():
    page = render_report(make_run(loss="squared-hinge"))
    assert "Platt scaling" in page and "squared hinge loss" in page
    with pytest.raises(ValueError, match="loss"):
        render_report(make_run(loss="hinge"))


def svg_of(page, label):
    """The SVG chart whose aria-label starts with ``label``."""
    at = page.index(f'aria-label="{label}')
    return page[page.rindex("<svg", 0, at):page.index("</svg>", at) + len("</svg>")]


def verdict_of(page):
    """(class, text) of each part of the verdict line."""
    line = re.search(r'<p class="verdict">(.*?)</p>', page).group(1)
    return re.findall(r'<span class="(ok|bad|unknown)">([^<]*)</span>', line)


def with_losses(run, losses, best_pass):
    """The run with its passes' holdout log-loss set to ``losses``."""
    for p, value in zip(run["passes"], losses):
        p["holdout"] = dict(p["holdout"], log_loss=value)
    run["best_pass"] = best_pass
    return run


@pytest.mark.parametrize("overshoot", [1.0, 1.6])
def test_verdict_reads_base_rate_calibration_and_last_pass(overshoot):
    y, p, w = scored(7, n=20000, centre=-3.2, overshoot=overshoot)
    acc = BinaryMetrics()
    acc.update(y, p, w)
    final = acc.summary()
    run = make_run(centre=-3.2)
    run["final_holdout"] = run["passes"][-1]["holdout"] = final
    ll = final["log_loss"]
    page = render_report(with_losses(run, [1.2 * ll, 1.1 * ll, ll], 3))
    parts = verdict_of(page)
    text = html.unescape(page)
    # Reference: sklearn.metrics.log_loss of always predicting the weighted base rate.
    base = np.average(y, weights=w)
    base_ll = log_loss(y, np.full(y.size, base), sample_weight=w)
    assert f"against {base_ll:.4g} for always predicting the base rate" in text
    assert parts[0] == ("ok", f"\u2713 Better than the base rate (normalized entropy "
                              f"{final['normalized_entropy']:.3g})")
    # Reference: statsmodels Wilson intervals per bin, and scipy's binomial quantile for the
    # misses a calibrated model shows by chance (95% of the time).
    held = 0
    for b in final["bins"]:
        n_eff = b["weight"] ** 2 / np.sum(w[(p >= b["lo"]) & (p <= b["hi"])] ** 2)
        lo, hi = proportion_confint(b["observed_rate"] * n_eff, n_eff, method="wilson")
        held += lo <= b["mean_prediction"] <= hi
    n = len(final["bins"])
    calibrated = n - held <= binom.ppf(0.95, n, 0.05)
    assert calibrated == (overshoot == 1.0)
    head = f"alibrated within its intervals ({held} of {n} bins)"
    assert parts[1] == (("ok", "\u2713 C" + head) if calibrated else ("bad", "\u2717 Not c" + head))
    assert parts[2] == ("ok", "\u2713 Last pass improved the holdout (-9.1%)")
    worse = render_report(with_losses(make_run(), [0.3, 0.25, 0.26], 2))
    assert verdict_of(worse)[2] == ("bad", "\u2717 Last pass did not improve the holdout (+4%)")
    assert "the weights of pass 2 are kept" in worse


def test_verdict_without_holdout_says_n_a():
    run = make_run()
    run.update(passes=[], final_holdout=None)
    # Reference: nothing to judge; every part says so (common practice: no figure, no claim).
    assert [kind for kind, _ in verdict_of(render_report(run))] == ["unknown"] * 3


def test_options_table_shows_defaults_and_values_used():
    page = render_report(make_run())
    rows = dict(re.findall(r'<tr><td class="t">(--[a-z0-9-]+)</td><td class="t">([^<]*)</td></tr>',
                           page))
    # Reference: the TrainOptions defaults (README, `hashcurve train`); an unset option shows
    # what it resolved to, never Python's None.
    assert "None" not in "".join(parse(page).text)
    assert rows["--epochs"] == "3 (default)" and rows["--l2-strength"] == "1e-06"
    assert rows["--step0"] == "0.3 (default: the solver&#x27;s own)"
    assert rows["--start"] == "default: no limit, from the first day"


def test_auc_bound_is_explained_in_words():
    run = make_run()
    page = render_report(run)
    bound = run["final_holdout"]["auc_error_bound"]
    # Reference: trainer.metrics documents auc_error_bound as a bound on the binned AUC.
    assert "\u00b1" not in page and bound > 0
    assert f"it is within {bound:.1g} of the exact AUC of these scores" in page
    assert "not sampling error" in page


def tick_x(svg):
    """{label: x} of the x-axis tick labels (the text elements below the plot box)."""
    return {t: float(x) for x, y, t in re.findall(
        r'<text x="([0-9.]+)" y="([0-9.]+)" text-anchor="middle" font-size="11">([^<]*)</text>',
        svg) if float(y) > 260}


@pytest.mark.parametrize("centre, axis, expect_log", [
    (-3.2, "auto", True), (-1.5, "auto", False), (-3.2, "linear", False), (-1.5, "log", True)])
def test_reliability_axis_is_log_scaled_at_low_base_rates(centre, axis, expect_log):
    run = make_run(centre=centre)
    page = render_report(run, probability_axis=axis)
    svg = svg_of(page, "Reliability")
    ticks = tick_x(svg)
    assert ("log-scaled axes" in svg) == expect_log
    # Reference: tick positions are linear in log10 of the value on a log axis, in the value on
    # a linear one (common practice).
    values = sorted((float(k), x) for k, x in ticks.items())
    scaled = np.log10([k for k, _ in values]) if expect_log else np.array([k for k, _ in values])
    assert len(values) >= 3
    steps = np.diff([x for _, x in values]) / np.diff(scaled)
    assert steps == pytest.approx(steps[0], rel=2e-3)
    bins = run["final_holdout"]["bins"]
    # Reference: one dot and one table row per bin of the summary.
    assert svg.count("<circle") == len(bins) >= 10
    assert page.count("<tr>") - page.count("<tr><td class=\"t\">--") >= len(bins)
    with pytest.raises(ValueError, match="probability_axis"):
        render_report(run, probability_axis="logit")


def test_per_pass_chart_shows_calibration_ratio():
    run = make_run()
    svg = svg_of(render_report(run), "Holdout predicted / observed after each pass")
    points = re.search(r'<polyline points="([^"]*)"', svg).group(1).split()
    # Reference: one point per pass with a holdout, and the line of perfect calibration at 1.0.
    assert len(points) == len(run["passes"]) and "calibrated (1.0)" in svg


def test_squared_hinge_run_shows_margin_figures():
    rng = np.random.default_rng(11)
    margins = rng.normal(0.0, 1.0, 3000)
    labels = (rng.random(3000) < 1 / (1 + np.exp(-2 * margins))).astype(float)
    acc = MarginMetrics()
    acc.update(labels, margins)
    run = make_run(loss="squared-hinge")
    for k, p in enumerate(run["passes"]):
        p["holdout"] = {"rows": 3000, "positives": int(labels.sum()), "margin": acc.summary(),
                        "squared_hinge_loss": 0.9 - 0.1 * k}
    run["final_holdout"] = run["passes"][-1]["holdout"]
    page = render_report(run)
    # Reference: sklearn.metrics.roc_auc_score of the margins, shown where a probability AUC would be.
    auc = roc_auc_score(labels, margins)
    assert f'<div class="k">AUC</div><div class="v">{auc:.4g}</div>' in page
    svg = svg_of(page, "Holdout squared hinge loss after each pass")
    assert len(re.search(r'<polyline points="([^"]*)"', svg).group(1).split()) == 3
    assert verdict_of(page)[2][0] == "ok"


def test_write_report_replaces_atomically(tmp_path):
    target = tmp_path / "report.html"
    target.write_text("old")
    write_report(make_run(), target)
    # Reference: html.parser reads back the page; no temporary file is left beside it.
    assert [t for t, _ in parse(target.read_text()).tags].count("svg") == N_CHARTS
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report.html"]
    with pytest.raises(UserError, match="does not exist"):
        write_report(make_run(), tmp_path / "missing" / "report.html")


def _png_bytes(rows, channels):
    """Encode rows of 8-bit samples as a PNG, row r filtered with type r % 5 (PNG specification,
    ISO/IEC 15948:2004, from memory)."""
    height, stride = rows.shape
    bpp = channels
    raw = bytearray()
    prev = np.zeros(stride, np.int64)
    for r in range(height):
        cur = rows[r].astype(np.int64)
        kind = r % 5
        out = []
        for c in range(stride):
            a = cur[c - bpp] if c >= bpp else 0
            b = prev[c]
            d = prev[c - bpp] if c >= bpp else 0
            pred = [0, a, b, (a + b) // 2, 0][kind]
            if kind == 4:
                p = a + b - d
                pa, pb, pc = abs(p - a), abs(p - b), abs(p - d)
                pred = a if pa <= pb and pa <= pc else (b if pb <= pc else d)
            out.append((cur[c] - pred) % 256)
        raw.append(kind)
        raw.extend(out)
        prev = cur

    def chunk(kind, data):
        return (struct.pack(">I", len(data)) + kind + data
                + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF))

    colour = {3: 2, 4: 6}[channels]
    ihdr = struct.pack(">IIBBBBB", stride // channels, height, 8, colour, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(bytes(raw)))
            + chunk(b"IEND", b""))


@pytest.mark.parametrize("channels", [3, 4])
def test_png_decoder_undoes_every_filter(tmp_path, channels):
    rng = np.random.default_rng(12)
    pixels = rng.integers(0, 256, (10, 7 * channels)).astype(np.uint8)
    path = tmp_path / "x.png"
    path.write_bytes(_png_bytes(pixels, channels))
    image = decode_png(path)
    # Reference: the pixels encoded by the filter definitions of the PNG specification above.
    assert image.shape == (10, 7, channels)
    assert np.array_equal(image.reshape(10, -1), pixels)
    assert _load_script().png_size(path) == (7, 10)


def test_browser_render_is_not_blank(tmp_path):
    script = _load_script()
    if script.find_browser() is None:
        pytest.skip("no Chromium binary on PATH (chromium / chromium-browser)")
    page = write_report(make_run(), tmp_path / "report.html")
    image = decode_png(script.render_png(page, tmp_path / "report.png", 1200, 2000))
    assert image.shape[:2] == (2000, 1200)
    rgb = image[..., :3].astype(int)
    assert np.unique(rgb.reshape(-1, 3), axis=0).shape[0] > 1
    # Reference: the page background is white and the charts draw in our two series colours.
    assert tuple(rgb[0, 0]) == (255, 255, 255)
    for colour in (BLUE, ORANGE):
        assert np.sum(np.all(np.abs(rgb - colour) <= 8, axis=-1)) > 200


def dot_pixels(image):
    """(rows, columns) of the pixels in the reliability chart's plot box drawn in a dot colour."""
    box = image[40:268, 70:522, :3].astype(int)
    mask = np.zeros(box.shape[:2], bool)
    for colour in (BLUE, ORANGE):
        mask |= np.all(np.abs(box - colour) <= 8, axis=-1)
    return np.nonzero(mask), box.shape[1]


def test_browser_render_of_verdict_and_reliability_axes(tmp_path):
    script = _load_script()
    if script.find_browser() is None:
        pytest.skip("no Chromium binary on PATH (chromium / chromium-browser)")
    run = make_run(centre=-3.2)
    run["final_holdout"] = holdout(7, n=20000, centre=-3.2, overshoot=1.6)
    page = write_report(with_losses(run, [0.3, 0.25, 0.26], 2), tmp_path / "report.html")
    rgb = decode_png(script.render_png(page, tmp_path / "report.png", 1200, 300))[..., :3].astype(int)
    # Reference: the verdict line draws a passed check in green and a failed one in red.
    for colour in (GREEN, RED):
        assert np.sum(np.all(np.abs(rgb - colour) <= 8, axis=-1)) > 100
    medians = {}
    for axis in ("log", "linear"):
        svg = svg_of(render_report(make_run(centre=-3.2), probability_axis=axis), "Reliability")
        chart = tmp_path / f"{axis}.html"
        chart.write_text(f'<!DOCTYPE html><html><body style="margin:0">{svg}</body></html>')
        image = decode_png(script.render_png(chart, tmp_path / f"{axis}.png", 560, 340))
        (_, cols), width = dot_pixels(image)
        medians[axis] = np.median(cols) / width
    # Reference: at an 8% base rate the dots of a linear diagram crowd its left edge; log-scaled
    # axes spread them (half the dot pixels beyond a third of the plot's width).
    assert medians["linear"] < 0.2 < 0.35 < medians["log"]
