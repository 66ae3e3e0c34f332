"""The HTML report: self-contained, escaped, and checked in a real browser (headless Chromium)."""

from __future__ import annotations

import html
import json
import os
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

from unmix.cli import main
from unmix.matrix import BleedThroughMatrix
from unmix.coloc.verdict import VERDICTS

ARTIFACTS = Path(__file__).parent / "artifacts"
CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-quic"]


def _chromium():
    path = shutil.which("chromium") or shutil.which("chromium-browser")
    if path is None:
        if os.environ.get("CI"):
            pytest.fail("chromium is not installed: ./dev.sh test installs it (apt-get install chromium)")
        pytest.skip("chromium is not installed (./dev.sh test installs it)")
    return path


@pytest.fixture(scope="module")
def demo_report(tmp_path_factory):
    from unmix.demo import run_demo

    outdir = tmp_path_factory.mktemp("demo")
    result = run_demo(outdir, out=open(os.devnull, "w"))
    return result["report"]


def test_report_shows_every_verdict_code_and_the_cautions(demo_report):
    text = demo_report.read_text(encoding="utf-8")
    for code, explanation in VERDICTS.items():
        assert f">{code}</code>" in text and html.escape(explanation, quote=True) in text
    assert "bleed-through-only" in text and "Cautions" in text and "not molecular" in text
    # Self-contained: no resource from anywhere but the file itself (links are allowed).
    sources = re.findall(r"""(?:src|href)=['"]([^'"]+)""", text)
    assert all(s.startswith("data:image/png;base64,") for s in re.findall(r"""src=['"]([^'"]+)""", text))
    assert not re.search(r"<(link|script|iframe|object|embed)\b", text)
    assert all(s.startswith(("data:", "https://doi.org/")) for s in sources)


def test_names_from_user_files_are_escaped(tmp_path, capsys):
    evil = "<script>alert(1)</script>"
    matrix = BleedThroughMatrix(kind="measured", channels=("a", evil), labels=(evil, "B"),
                                primary={evil: "a", "B": evil}, matrix=np.array([[1.0, 0.1], [0.2, 1.0]]),
                                ci95_low=np.array([[1.0, 0.05], [0.15, 1.0]]),
                                ci95_high=np.array([[1.0, 0.15], [0.25, 1.0]]),
                                background=np.zeros(2), background_source="dark")
    matrix.save(tmp_path / "m.json")
    assert main(["report", "--matrix", str(tmp_path / "m.json"), "-o", str(tmp_path / "r.html"), "--quiet"]) == 0
    text = (tmp_path / "r.html").read_text(encoding="utf-8")
    assert evil not in text and "&lt;script&gt;alert(1)&lt;/script&gt;" in text


def test_report_refuses_a_file_that_is_not_coloc_output(tmp_path, capsys):
    matrix = BleedThroughMatrix(kind="measured", channels=("a", "b"), labels=("A", "B"), primary={"A": "a", "B": "b"},
                                matrix=np.eye(2), ci95_low=np.eye(2), ci95_high=np.eye(2), background=np.zeros(2),
                                background_source="dark")
    matrix.save(tmp_path / "m.json")
    (tmp_path / "c.json").write_text(json.dumps({"pair": ["A", "B"]}))
    assert main(["report", "--matrix", str(tmp_path / "m.json"), "--coloc", str(tmp_path / "c.json"),
                 "-o", str(tmp_path / "r.html")]) == 2
    assert "c.json" in capsys.readouterr().err and not (tmp_path / "r.html").exists()


def _page_requests(chromium, page: Path, folder: Path) -> tuple[set, str]:
    """Network requests made for the page (Chromium's network log), and the dumped DOM.

    Chromium's own background jobs (time sync, account checks) run at IDLE priority even with
    the networking flags off; whatever the page loads runs at a higher priority.
    """
    netlog = folder / f"{page.stem}.netlog.json"
    run = subprocess.run([chromium, *CHROMIUM_FLAGS, f"--user-data-dir={folder / (page.stem + '-profile')}",
                          f"--log-net-log={netlog}", "--virtual-time-budget=5000", "--dump-dom", page.as_uri()],
                         capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stderr[-2000:]
    events = re.findall(r'\{"priority":"([A-Z]+)"[^{}]*"url":"([a-z]+://[^"]*)"\}', netlog.read_text(errors="replace"))
    return {url for priority, url in events if priority != "IDLE" and not url.startswith(("file:", "data:"))}, run.stdout


def test_demo_report_in_a_real_browser(demo_report, tmp_path):
    # Headless Chromium loads the report from disk: every figure decodes (non-zero natural
    # size), no request leaves the machine (Chromium's own network log), and a screenshot of
    # the first screen is kept under tests/artifacts.
    chromium = _chromium()
    leaky = tmp_path / "leaky.html"
    leaky.write_text("<html><body><img src='https://example.invalid/figure.png'></body></html>")
    assert _page_requests(chromium, leaky, tmp_path)[0] == {"https://example.invalid/figure.png"}  # the check works
    probe = tmp_path / "probe.html"
    probe.write_text(demo_report.read_text(encoding="utf-8").replace(
        "</body>", "<script>window.addEventListener('load', () => { document.body.setAttribute('data-sizes', "
                   "JSON.stringify([...document.images].map(i => i.naturalWidth + 'x' + i.naturalHeight))); });"
                   "</script></body>"), encoding="utf-8")
    requests, dom = _page_requests(chromium, probe, tmp_path)
    assert requests == set()
    sizes = json.loads(re.search(r'data-sizes="([^"]*)"', dom).group(1).replace("&quot;", '"'))
    expected = demo_report.read_text(encoding="utf-8").count("<img")
    assert expected >= 4 and len(sizes) == expected  # matrices, measured vs predicted, two histograms
    assert all(not s.startswith("0x") and not s.endswith("x0") for s in sizes), sizes
    ARTIFACTS.mkdir(exist_ok=True)
    shot = ARTIFACTS / "demo_report_first_screen.png"
    shot.unlink(missing_ok=True)
    run = subprocess.run([chromium, *CHROMIUM_FLAGS, f"--user-data-dir={tmp_path / 'profile2'}",
                          f"--screenshot={shot}", "--window-size=1280,900", demo_report.as_uri()],
                         capture_output=True, text=True, timeout=120)
    assert run.returncode == 0 and shot.stat().st_size > 10_000, run.stderr[-2000:]
