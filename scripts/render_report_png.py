"""Render a report page to a PNG with headless Chromium.

Usage: python scripts/render_report_png.py REPORT.html OUT.png [--width 1200] [--height 2000]
                                            [--browser PATH]

Exit status 0 when the PNG was written (its size is printed), 1 when the browser failed, 2 when
the page or the browser is missing. The browser runs with its networking features off and a
throw-away profile folder. tests/test_report.py decodes the PNG and checks it is not blank.
"""

from __future__ import annotations

import argparse
import os
import shutil
import struct
import subprocess
import sys
import tempfile
from pathlib import Path

BROWSER_NAMES = ("chromium", "chromium-browser")


def find_browser() -> str | None:
    """Path of a Chromium binary on PATH, or None. Raises nothing."""
    for name in BROWSER_NAMES:
        found = shutil.which(name)
        if found:
            return found
    return None


def render_png(html_path, png_path, width: int = 1200, height: int = 2000,
               browser: str | None = None, timeout: float = 120.0) -> Path:
    """Screenshot ``html_path`` (a local file) into ``png_path`` with headless Chromium.

    Takes the page path, the PNG path, the window size in pixels, an optional browser binary
    (default: :func:`find_browser`) and a timeout in seconds. The browser writes a temporary file
    beside ``png_path``, which is then renamed over it. Returns the PNG path. Raises
    FileNotFoundError when the page or the browser is missing, RuntimeError when the browser
    fails or writes no PNG, subprocess.TimeoutExpired when it hangs.
    """
    page = Path(html_path).resolve()
    if not page.is_file():
        raise FileNotFoundError(f"no such page: {page}")
    binary = browser or find_browser()
    if binary is None:
        raise FileNotFoundError("no Chromium binary on PATH (looked for: "
                                + ", ".join(BROWSER_NAMES) + ")")
    out = Path(png_path).resolve()
    tmp = out.with_name(f".{out.name}.{os.getpid()}.tmp.png")
    try:
        with tempfile.TemporaryDirectory(prefix="report-browser-") as profile:
            cmd = [binary, "--headless", "--no-sandbox", "--disable-gpu",
                   "--disable-background-networking", "--disable-component-update",
                   "--disable-sync", "--no-first-run", "--hide-scrollbars",
                   f"--user-data-dir={profile}", f"--screenshot={tmp}",
                   f"--window-size={width},{height}", page.as_uri()]
            done = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout,
                                  check=False)
        if done.returncode != 0 or not tmp.is_file():
            raise RuntimeError(f"browser exit {done.returncode}, no PNG written; stderr: "
                               + done.stderr.strip()[-500:])
        os.replace(tmp, out)
    finally:
        tmp.unlink(missing_ok=True)
    return out


def png_size(path) -> tuple[int, int]:
    """(width, height) from the IHDR chunk of a PNG file. Raises ValueError for a non-PNG file."""
    head = Path(path).read_bytes()[:24]
    if head[:8] != b"\x89PNG\r\n\x1a\n" or head[12:16] != b"IHDR":
        raise ValueError(f"{path}: not a PNG file")
    return struct.unpack(">II", head[16:24])


def main(argv=None) -> int:
    """Command line entry: render the page and print the PNG size; see the module docstring."""
    parser = argparse.ArgumentParser(description="Render a report page to PNG (headless Chromium).")
    parser.add_argument("html", help="report page (HTML file)")
    parser.add_argument("png", help="PNG file to write")
    parser.add_argument("--width", type=int, default=1200, help="window width in pixels")
    parser.add_argument("--height", type=int, default=2000, help="window height in pixels")
    parser.add_argument("--browser", default=None, help="Chromium binary (default: search PATH)")
    args = parser.parse_args(argv)
    try:
        out = render_png(args.html, args.png, args.width, args.height, args.browser)
    except FileNotFoundError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    except (RuntimeError, subprocess.TimeoutExpired) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    width, height = png_size(out)
    print(f"{out}: {width}x{height} pixels")
    return 0


if __name__ == "__main__":
    sys.exit(main())
