"""report.html: self-contained (images as base64 PNG data URIs), rendered by a real browser with its images."""
import base64
import json
import re
import shutil
import struct
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
CHROMIUM = Path("/usr/bin/chromium")
needs_chromium = pytest.mark.skipif(not CHROMIUM.exists(),
                                    reason="/usr/bin/chromium is absent: install the Debian package `chromium`")


def report(*args):
    return subprocess.run([sys.executable, "-m", "shrinkwrap", "report", *map(str, args)], capture_output=True,
                          text=True, cwd=ROOT, timeout=120)


def png_size(data: bytes) -> tuple[int, int]:
    # PNG signature, then the IHDR chunk: width and height as big-endian uint32 (PNG spec, section 11.2.2).
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


@pytest.fixture
def results(tiny_run, tmp_path):
    dst = tmp_path / "in" / "results.json"
    dst.parent.mkdir()
    shutil.copy(tiny_run / "results.json", dst)
    return dst


def test_run_writes_report_html_beside_report_md(tiny_run):
    assert (tiny_run / "report.md").is_file() and (tiny_run / "report.html").is_file()


def test_report_command_writes_both_self_contained(results, tmp_path):
    out = tmp_path / "out"
    r = report(results, "--out", out)
    assert r.returncode == 0, r.stderr
    page = (out / "report.html").read_text(encoding="utf-8")
    md = (out / "report.md").read_text(encoding="utf-8")
    # Nothing outside the file: no links, no external scripts or styles, every image inline.
    assert not re.search(r"""(src|href)=["']?(https?:|//|file:|[^"'d])""", page)
    srcs = re.findall(r'<img src="([^"]+)"', page)
    data = json.loads(results.read_text())
    # accuracy vs p95, size, per-class recall drop, a reliability diagram per step, accuracy vs coverage
    assert len(srcs) == 3 + len(data["steps"]) + 1
    alts = re.findall(r'<img src="[^"]+" alt="([^"]+)"', page)
    for s in data["steps"]:
        assert s["metrics"]["reliability"]
        # the shipped step's diagram is of its calibrated scores, as predict gives them
        ece = s["calibration"]["ece"] if "calibration" in s else s["metrics"]["ece"]
        assert any(a.startswith(f"Reliability diagram of {s['name']}:") and f"ECE {ece:.4f}" in a for a in alts)
    final = data["steps"][-1]
    assert any(a.startswith(f"Accuracy against coverage of {final['name']}") and
               f"temperature {final['calibration']['temperature']:.3f}" in a for a in alts)
    for src in srcs:
        assert src.startswith("data:image/png;base64,")
        w, h = png_size(base64.b64decode(src.split(",", 1)[1], validate=True))
        assert w > 300 and h > 100
    for s in data["steps"]:
        assert f">{s['name']}<" in page
    for s in data["steps"][1:]:
        lo, hi = s["accuracy_drop_ci95"]
        cell = f"{s['accuracy_drop']:+.2f} [{lo:+.2f}, {hi:+.2f}]"
        assert cell in md and cell in page
    assert "drop pts (95 % CI)" in md


def test_report_command_defaults_beside_results(results):
    r = report(results)
    assert r.returncode == 0, r.stderr
    assert (results.parent / "report.md").is_file() and (results.parent / "report.html").is_file()


def test_report_on_broken_results_exits_2_and_writes_nothing(results, tmp_path):
    data = json.loads(results.read_text())
    del data["steps"][0]["metrics"]
    results.write_text(json.dumps(data))
    out = tmp_path / "out"
    r = report(results, "--out", out)
    assert r.returncode == 2 and "metrics" in r.stderr and "Traceback" not in r.stderr
    assert not out.exists()
    r = report(tmp_path / "missing.json")
    assert r.returncode == 2 and "no such results file" in r.stderr


def chromium(page: Path, tmp_path: Path, *args: str) -> subprocess.CompletedProcess:
    profile = tmp_path / f"profile-{len(list(tmp_path.iterdir()))}"
    cmd = [str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={profile}", *args, page.resolve().as_uri()]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=120)


@needs_chromium
def test_headless_chromium_decodes_every_image(tiny_run, tmp_path):
    # The page's own script marks <body> once loaded: decoded images / all images (img.complete and naturalWidth > 0).
    n = (tiny_run / "report.html").read_text(encoding="utf-8").count("<img ")
    assert n > 3
    r = chromium(tiny_run / "report.html", tmp_path, "--virtual-time-budget=5000", "--dump-dom")
    assert r.returncode == 0, r.stderr[-2000:]
    assert f'data-images-decoded="{n}/{n}"' in r.stdout


@needs_chromium
def test_headless_chromium_notices_a_broken_image(tiny_run, tmp_path):
    # The same check must be able to fail: corrupt one image's bytes and the page reports one fewer.
    page = (tiny_run / "report.html").read_text(encoding="utf-8")
    n = page.count("<img ")
    broken = page.replace("data:image/png;base64,iVBOR", "data:image/png;base64,AAAAA", 1)
    assert broken != page
    path = tmp_path / "broken.html"
    path.write_text(broken, encoding="utf-8")
    r = chromium(path, tmp_path, "--virtual-time-budget=5000", "--dump-dom")
    assert f'data-images-decoded="{n - 1}/{n}"' in r.stdout


@needs_chromium
def test_headless_chromium_screenshot_is_not_blank(tiny_run, tmp_path):
    shot = tmp_path / "report.png"
    r = chromium(tiny_run / "report.html", tmp_path, f"--screenshot={shot}", "--window-size=1200,2000")
    assert r.returncode == 0 and shot.is_file(), r.stderr[-2000:]
    assert png_size(shot.read_bytes()) == (1200, 2000)
    import matplotlib.image

    pixels = matplotlib.image.imread(shot)
    # A page that rendered text and plots has many distinct colours; a blank or error page has a few.
    assert len({tuple(p) for p in pixels[::7, ::7, :3].reshape(-1, 3).round(2).tolist()}) > 50
