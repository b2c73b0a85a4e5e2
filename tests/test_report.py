"""Checks of trainer.report: structure (html.parser), escaping, atomic write, browser render."""

import importlib.util
import math
import struct
import zlib
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from numba import njit

from trainer.errors import UserError
from trainer.metrics import BinaryMetrics
from trainer.report import render_report, write_report

SCRIPT = Path(__file__).resolve().parents[1] / "scripts" / "render_report_png.py"
N_CHARTS = 5
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


def holdout(seed, n=4000, single_class=False):
    rng = np.random.default_rng(seed)
    z = rng.normal(-1.5, 1.3, n)
    p = 1 / (1 + np.exp(-z))
    y = np.zeros(n) if single_class else (rng.random(n) < p).astype(float)
    acc = BinaryMetrics()
    acc.update(y, p, rng.uniform(0.5, 2.0, n))
    return acc.summary()


def make_run(loss="logistic", title="Run of 2026-03-04", examples=("shop=shop-3",)):
    passes = [{"pass": k, "rows": 3000 * k, "progressive_loss": 0.5 - 0.03 * k,
               "holdout": holdout(k)} for k in (1, 2, 3)]
    return {
        "title": title,
        "options": {"epochs": 3, "l2_strength": 1e-6, "bits": 18, "holdout": "day >= 2026-03-03"},
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
    assert "no holdout rows" in "".join(doc.text)


def test_squared_hinge_run_mentions_platt_scaling():
    page = render_report(make_run(loss="squared-hinge"))
    assert "Platt scaling" in page and "squared hinge loss" in page
    with pytest.raises(ValueError, match="loss"):
        render_report(make_run(loss="hinge"))


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
