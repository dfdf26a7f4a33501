"""The HTML report in a real browser: headless Chromium renders the page of a run over several
targets; the rendered DOM holds a map per failing tensor and the screenshot is not blank.

Needs Debian's ``chromium`` (``.ci/run`` installs it). Outside CI the test is skipped when no
browser is found; in CI (``CI`` set) a missing browser fails it.
"""

from __future__ import annotations

import os
import re
import shutil
import struct
import subprocess
import zlib
from pathlib import Path

import numpy as np
import pytest
from html_pages import FAILING, targets

from gradprobe.render.svgmap import LEVELS

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync"]


def browser() -> str:
    found = shutil.which("chromium") or ("/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)
    if found:
        return found
    if os.environ.get("CI"):
        pytest.fail("no Chromium in CI: .ci/run should have installed Debian's chromium")
    pytest.skip("no Chromium found (/usr/bin/chromium or on PATH); on Debian: apt-get install chromium")


def chromium(tmp_path: Path, *args: str) -> subprocess.CompletedProcess:
    command = [browser(), *FLAGS, f"--user-data-dir={tmp_path / 'profile'}", *args]
    return subprocess.run(command, capture_output=True, timeout=120, check=True)


def png_pixels(data: bytes) -> np.ndarray:
    """The RGB pixels of an 8-bit, non-interlaced RGB or RGBA PNG (PNG spec, ISO/IEC 15948,
    section 9: the five filter types), as an array of shape (height, width, 3)."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    pos, idat = 8, b""
    while pos < len(data):
        (length,) = struct.unpack(">I", data[pos:pos + 4])
        kind, body = data[pos + 4:pos + 8], data[pos + 8:pos + 8 + length]
        pos += 12 + length
        if kind == b"IHDR":
            width, height, depth, colour, _, _, interlace = struct.unpack(">IIBBBBB", body)
            assert depth == 8 and colour in (2, 6) and interlace == 0
        elif kind == b"IDAT":
            idat += body
    bpp = 3 if colour == 2 else 4
    raw = np.frombuffer(zlib.decompress(idat), dtype=np.uint8).reshape(height, width * bpp + 1)
    out = np.zeros((height, width * bpp), dtype=np.uint8)
    prior = np.zeros(width * bpp, dtype=np.uint8)
    for r in range(height):
        kind, line = raw[r, 0], raw[r, 1:]
        if kind == 0:
            row = line.copy()
        elif kind == 1:  # Sub: running sum per channel
            row = (np.cumsum(line.reshape(width, bpp).astype(np.int64), axis=0) % 256).astype(np.uint8).reshape(-1)
        elif kind == 2:  # Up
            row = (line.astype(np.int64) + prior) % 256
        else:  # Average (3) or Paeth (4): each byte depends on the one before it
            cur, up, done = line.tolist(), prior.tolist(), [0] * (width * bpp)
            for i in range(width * bpp):
                a = done[i - bpp] if i >= bpp else 0
                b, c = up[i], up[i - bpp] if i >= bpp else 0
                if kind == 3:
                    done[i] = (cur[i] + (a + b) // 2) % 256
                else:
                    p = a + b - c
                    pa, pb, pc = abs(p - a), abs(p - b), abs(p - c)
                    pred = a if pa <= pb and pa <= pc else b if pb <= pc else c
                    done[i] = (cur[i] + pred) % 256
            row = np.array(done)
        out[r] = row
        prior = out[r].astype(np.int64)
    return out.reshape(height, width, bpp)[:, :, :3]


def test_png_decoder_on_a_known_image():
    """A 2x2 image written with filter types 1 and 4 decodes to the pixels put in."""
    pixels = np.array([[[255, 0, 0], [0, 255, 0]], [[0, 0, 255], [250, 250, 250]]], dtype=np.uint8)
    sub = bytes([1, 255, 0, 0, (0 - 255) % 256, 255, 0])  # second pixel minus the first
    # Paeth on row 2: first pixel predicted by the pixel above, second by Paeth(a, b, c)
    first = [(0 - 255) % 256, (0 - 0) % 256, (255 - 0) % 256]
    second = []
    for ch in range(3):
        a, b, c = int(pixels[1, 0, ch]), int(pixels[0, 1, ch]), int(pixels[0, 0, ch])
        p = a + b - c
        pred = a if abs(p - a) <= abs(p - b) and abs(p - a) <= abs(p - c) else b if abs(p - b) <= abs(p - c) else c
        second.append((int(pixels[1, 1, ch]) - pred) % 256)
    raw = sub + bytes([4, *first, *second])

    def chunk(kind: bytes, body: bytes) -> bytes:
        return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body))

    png = (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", struct.pack(">IIBBBBB", 2, 2, 8, 2, 0, 0, 0))
           + chunk(b"IDAT", zlib.compress(raw)) + chunk(b"IEND", b""))
    assert np.array_equal(png_pixels(png), pixels)


def test_chromium_renders_a_map_for_every_failing_tensor(run_cli, write_target, tmp_path):
    result = run_cli("check", *targets(write_target), "--html", "run.html")
    assert result.exit_code == 1
    page = (tmp_path / "run.html").as_uri()

    dom = chromium(tmp_path, "--dump-dom", page).stdout.decode()
    figures = re.findall(r'<figure class="gp-figure" id="[^"]+" data-tensor="([^"]+)">(.*?)</figure>', dom, re.DOTALL)
    assert {name for name, _ in figures} == FAILING and len(figures) == len(FAILING)
    for _, body in figures:
        assert "<svg" in body and "<path" in body

    shot = tmp_path / "page.png"
    chromium(tmp_path, f"--screenshot={shot}", "--window-size=1000,1600", page)
    pixels = png_pixels(shot.read_bytes())
    assert pixels.shape == (1600, 1000, 3)
    colours = {tuple(int(v) for v in p) for p in pixels.reshape(-1, 3)[::7]}
    assert len(colours) > 50  # text, tables and maps, not a blank page
    # field.K's wrong slice is off by about 0.5 relative: 5e5 x the threshold, decade 5
    wanted = np.array([int(LEVELS[5][k:k + 2], 16) for k in (1, 3, 5)])
    assert (np.abs(pixels.astype(int) - wanted).max(axis=2) <= 2).sum() > 100
