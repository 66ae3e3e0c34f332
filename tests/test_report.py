"""The HTML report: self-contained, escaped, and checked in a real browser (headless Chromium)."""

from __future__ import annotations

import html
import json
import os
import re
import shutil
import struct
import subprocess
from pathlib import Path

import numpy as np
import pytest

from unmix.cli import main
from unmix.matrix import BleedThroughMatrix
from unmix.coloc.verdict import VERDICTS
from unmix.report.html import FOOTNOTES, build_report
from unmix.report.style import VERDICT_LOOK

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


def _probe(chromium, page: Path, folder: Path, script: str, size=(1400, 1000)) -> str:
    """The DOM after `script` ran on the loaded page, in a window of `size` (CSS pixels)."""
    probe = folder / f"probe-{page.stem}.html"
    probe.write_text(page.read_text(encoding="utf-8").replace(
        "</body>", f"<script>window.addEventListener('load', () => {{ {script} }});</script></body>"), encoding="utf-8")
    run = subprocess.run([chromium, *CHROMIUM_FLAGS, f"--user-data-dir={folder / 'probe-profile'}",
                          f"--window-size={size[0]},{size[1]}", "--virtual-time-budget=5000", "--dump-dom",
                          probe.as_uri()], capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stderr[-2000:]
    return run.stdout


def _attribute(dom: str, name: str):
    return json.loads(html.unescape(re.search(f'{name}="([^"]*)"', dom).group(1)))


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
    # the sample thumbnails, the plane's two histograms, the stack's two depth profiles, both matrices,
    # measured vs predicted, the spectra
    assert expected == 8 and len(sizes) == expected
    assert all(not s.startswith("0x") and not s.endswith("x0") for s in sizes), sizes


def test_first_screen_of_the_demo_report_shows_every_verdict(demo_report, tmp_path):
    # In a 1400 x 1000 window, each pair's verdict (symbol, words and code) lies wholly on the
    # first screen, as the browser lays it out (bounding boxes from the page itself).
    chromium = _chromium()
    records = [record for name in ("coloc.json", "coloc_stack.json")  # the plane's pairs, then the z-stack's
               for record in json.loads((demo_report.parent / name).read_text())["results"]]
    dom = _probe(chromium, demo_report, tmp_path, (
        "const rows = [...document.querySelectorAll('table.answer tbody tr')].map(row => {"
        " const badge = row.querySelector('.badge'), code = row.querySelector('code.verdict');"
        " return [badge.textContent, code.textContent, row.children[1].textContent,"
        "         Math.max(badge.getBoundingClientRect().bottom, code.getBoundingClientRect().bottom,"
        "                  row.children[3].getBoundingClientRect().bottom)]; });"
        "document.body.setAttribute('data-verdicts', JSON.stringify([rows, window.innerWidth, window.innerHeight]));"))
    rows, width, _ = _attribute(dom, "data-verdicts")
    height = 1000  # the screenshot's viewport; headless --dump-dom reports a shorter inner window
    assert width == 1400  # the layout's width, on which the positions depend
    assert len(rows) == len(records) == 4
    for (badge, code, pair, bottom), record in zip(rows, records):
        look = VERDICT_LOOK[record["verdict"]]
        assert code == record["verdict"] and badge == f"{look.symbol} {look.heading}"
        assert pair.startswith(f"{record['pair'][0]} and {record['pair'][1]}")
        assert bottom <= height, f"{record['pair']}: verdict ends at {bottom} px, below the first screen"
    ARTIFACTS.mkdir(exist_ok=True)
    shot = ARTIFACTS / "demo_report_first_screen.png"
    shot.unlink(missing_ok=True)
    run = subprocess.run([chromium, *CHROMIUM_FLAGS, f"--user-data-dir={tmp_path / 'profile2'}",
                          f"--screenshot={shot}", "--window-size=1400,1000", demo_report.as_uri()],
                         capture_output=True, text=True, timeout=120)
    assert run.returncode == 0 and shot.stat().st_size > 10_000, run.stderr[-2000:]
    assert struct.unpack(">II", shot.read_bytes()[16:24]) == (1400, 1000)  # PNG header: width, height


def test_report_sections_lead_with_the_answer(demo_report):
    text = demo_report.read_text(encoding="utf-8")
    order = ["The answer", "QC problems", "The sample, raw and unmixed", "Each pair in detail",
             "Bleed-through matrix", "Quality of the controls", "Measured versus predicted", "Spectra and bands",
             "Cautions", "Inputs and checksums", "References"]
    positions = [text.index(f">{heading}</h") for heading in order]
    assert positions == sorted(positions)
    inputs = text[text.index(">Inputs and checksums</h2>"):]
    assert "sample.ome.tif" in inputs and "demo_optics.toml" in inputs
    assert not re.search(r"-0\.0+(?![0-9])", text)  # a value that rounds to zero prints as 0


def _matrix(**changes) -> BleedThroughMatrix:
    values = np.array([[1.0, 0.02], [0.25, 1.0]])
    options = dict(kind="measured", channels=("a", "b"), labels=("A", "B"), primary={"A": "a", "B": "b"},
                   matrix=values, ci95_low=values - 0.01, ci95_high=values + 0.01, background=np.zeros(2),
                   background_source="dark")
    return BleedThroughMatrix(**{**options, **changes})


def _record(matrix: BleedThroughMatrix, **changes) -> dict:
    side = {"pearson": 0.5, "spearman": 0.5, "manders_m1": 0.7, "manders_m2": 0.6, "thresholds": [10.0, 20.0],
            "icq": 0.2, "p_value": 0.001, "pearson_noise_corrected": 0.5, "pearson_noise_corrected_interval": [0.4, 0.6],
            "threshold_method": "costes", "note": "", "n_pixels": 100}
    record = {"pair": ["A", "B"], "before": dict(side), "after": dict(side), "verdict": "persists",
              "matrix_sha256": matrix.sha256(), "image": "x.tif", "object": None}
    for key, value in changes.items():
        if "." in key:
            part, name = key.split(".")
            record[part][name] = value
        else:
            record[key] = value
    return record


def test_numbers_that_round_to_zero_print_as_0():
    from unmix.report.summary import fixed

    assert [fixed(v) for v in (-0.00004, 0.0, -0.0, 0.00004, -0.00006, 0.25)] == ["0", "0", "0", "0", "-0.0001",
                                                                                 "0.2500"]
    text = build_report(_matrix(matrix=np.array([[1.0, -0.00003], [0.25, 1.0]]),
                                ci95_low=np.array([[1.0, -0.0004], [0.24, 1.0]]),
                                ci95_high=np.array([[1.0, 0.0004], [0.26, 1.0]])))
    assert "-0.0000" not in text and "0 [-0.0004, 0.0004]" in text


def test_footnotes_explain_negative_thresholds_and_manders_of_one():
    # Where B's threshold lies below every B value, every pixel counts as "B above threshold", and
    # M1 is exactly 1: scikit-image's manders_coloc_coeff gives the same (an outside reference).
    from skimage.measure import manders_coloc_coeff

    rng = np.random.default_rng(0)
    a, b = rng.uniform(0, 100, (32, 32)), rng.uniform(0, 100, (32, 32))
    assert manders_coloc_coeff(a, b > -12.0) == 1.0
    matrix = _matrix()
    plain = build_report(matrix, coloc_records=[_record(matrix)])
    assert FOOTNOTES["negative threshold"] not in plain and FOOTNOTES["manders one"] not in plain
    odd = build_report(matrix, coloc_records=[_record(matrix, **{"before.thresholds": [9.0, -12.0],
                                                                 "before.manders_m1": 1.0})])
    assert html.escape(FOOTNOTES["negative threshold"], quote=True) in odd
    assert html.escape(FOOTNOTES["manders one"], quote=True) in odd
    assert "9.0, -12.0<sup>" in odd and "1.0000<sup>" in odd


def test_qc_problems_are_listed_first_and_flagged_in_their_row():
    flag = "B in a: slope differs between dim and bright pixels (0.0100 vs 0.0300): a non-linear detector"
    grid = [[1.0, 0.9], [0.95, 1.0]]
    qc = {"r_squared": grid, "intercept": [[0.0, 0.1], [0.2, 0.0]], "slope_dim": [[1.0, 0.01], [0.24, 1.0]],
          "slope_bright": [[1.0, 0.03], [0.26, 1.0]], "registration_shift_px": [[0.0, 0.1], [0.1, 0.0]],
          "between_field_sd": [[None, 0.004], [0.01, None]], "flags": [flag],
          "labels": {"A": {"fields": 3, "usable_pixels": 5000}, "B": {"fields": 3, "usable_pixels": 4000}}}
    text = build_report(_matrix(qc=qc))
    problems = text[text.index(">QC problems</h2>"):text.index(">Bleed-through matrix</h2>")]
    assert html.escape(flag, quote=True) in problems
    rows = re.findall(r"<tr[^>]*>.*?</tr>", text[text.index(">Quality of the controls</h3>"):], re.S)
    flagged = [row for row in rows if "class=flagged" in row]
    assert len(flagged) == 1 and ">B<" in flagged[0] and "⚠ 0.0100 / 0.0300" in flagged[0]
    assert "5000" in text and "4000" in text and "0.9500" not in flagged[0]


def test_report_refuses_coloc_results_of_another_matrix(tmp_path, capsys):
    matrix = _matrix()
    matrix.save(tmp_path / "m.json")
    other = _matrix(matrix=np.array([[1.0, 0.03], [0.25, 1.0]]))
    (tmp_path / "other.json").write_text(json.dumps(_record(other)))
    (tmp_path / "old.json").write_text(json.dumps({k: v for k, v in _record(matrix).items() if k != "matrix_sha256"}))
    (tmp_path / "same.json").write_text(json.dumps(_record(matrix)))
    for name, words in (("other.json", "another matrix"), ("old.json", "does not record the matrix")):
        argv = ["report", "--matrix", str(tmp_path / "m.json"), "--coloc", str(tmp_path / "same.json"),
                "--coloc", str(tmp_path / name), "-o", str(tmp_path / "r.html")]
        assert main(argv) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and name in err[0] and words in err[0] and "m.json" in err[0]
        assert not (tmp_path / "r.html").exists()
    assert main(["report", "--matrix", str(tmp_path / "m.json"), "--coloc", str(tmp_path / "same.json"),
                 "-o", str(tmp_path / "r.html"), "--quiet"]) == 0


def _stack_files(tmp_path):
    """A z-stack of two labels (5 planes, 0.4 um apart) as an OME-TIFF, its matrix, and its coloc results
    as `unmix coloc --json` writes them."""
    from pair_scenes import ANISOTROPIC, measured_matrix, pair_scene, write_stack

    scene = pair_scene(71, r=0.4, peak_a=1500, leak=0.3, shape=(5, 48, 48), psf_sigma=ANISOTROPIC)
    measured_matrix(scene, 71).save(tmp_path / "m.json")
    write_stack(tmp_path / "stack.ome.tif", scene.raw, z_um=0.4)
    assert main(["coloc", str(tmp_path / "stack.ome.tif"), "--matrix", str(tmp_path / "m.json"), "--labels", "A,B",
                 "--rounds", "49", "--json", str(tmp_path / "stack.json"), "--quiet"]) == 0
    return tmp_path / "m.json", tmp_path / "stack.json"


def _report(tmp_path, matrix, *coloc) -> str:
    argv = ["report", "--matrix", str(matrix), "-o", str(tmp_path / "r.html"), "--quiet"]
    for path in coloc:
        argv += ["--coloc", str(path)]
    assert main(argv) == 0
    return (tmp_path / "r.html").read_text(encoding="utf-8")


def test_a_stack_result_shows_its_depth_profile_and_that_it_is_3d(tmp_path):
    # The number of planes and the Z step shown are the file's (tifffile wrote them); the figure is
    # the depth profile; the caution that projections inflate co-occurrence (Bolte & Cordelieres
    # 2006) stands with the result and among the cautions.
    from unmix.report.html import PROJECTION_CAUTION

    matrix, stack = _stack_files(tmp_path)
    text = _report(tmp_path, matrix, stack)
    detail = text[text.index(">Each pair in detail</h2>"):text.index(">Bleed-through matrix</h2>")]
    assert "This verdict is over voxels, in 3-D: 5 planes (planes 0 to 4 of stack.ome.tif), Z step 0.4 µm, " \
           f"{5 * 48 * 48:,} voxels; never a projection." in detail
    assert detail.count("<img alt='r by depth, A and B'") == 1 and "Depth trend of the corrected r: " in detail
    caution = html.escape(PROJECTION_CAUTION, quote=True)
    assert caution in detail and caution in text[text.index(">Cautions</h2>"):]
    assert "Bolte &amp; Cordelières 2006, J. Microsc. 224:213" in caution
    answer = text[text.index(">The answer</h2>"):text.index(">QC problems</h2>")]
    assert "stack.ome.tif, 3-D, 5 planes" in answer
    assert ">Time series</h2>" not in text


def test_a_time_series_gets_its_own_section_with_the_checks_in_words(tmp_path):
    # Simulated truth: label A fades by 15 % per time point (1 - 0.85^3 = 39 % over four) and from the
    # third time point part of it emits with another spectrum (the matrix stops fitting).
    from pair_scenes import series_matrix, time_series, write_stack

    data, truth = time_series(51, frames=4, bleach=0.15, photoconvert=0.5)
    matrix = series_matrix(truth, tmp_path / "m.json")
    movie = write_stack(tmp_path / "movie.ome.tif", data, axes="TCZYX", names=("c0", "c1", "c2"))
    assert main(["coloc", str(movie), "--matrix", str(matrix), "--labels", "A,B", "--rounds", "49", "--json",
                 str(tmp_path / "t.json"), "--quiet"]) == 0
    document = json.loads((tmp_path / "t.json").read_text())
    text = _report(tmp_path, matrix, tmp_path / "t.json")
    section = text[text.index(">Time series</h2>"):text.index(">Bleed-through matrix</h2>")]
    assert section.count("<img alt='A and B over time'") == 1
    counts = document["time_summaries"][0]["verdicts"]
    for verdict, count in counts.items():
        assert f"<code class='verdict'>{verdict}</code> at {count} of 4" in section
    fall = float(re.search(r"A loses (\d+) % of its signal from the first to the last time point", section).group(1))
    assert abs(fall - 100 * (1 - 0.85**3)) <= 3
    assert "the matrix no longer fits" in section and "B changes by" in section
    assert len(re.findall(r"<tr><td>\d</td><td><code class='verdict'>", section)) == 4  # one row per time point
    # The answer gives the series one row (its verdicts counted), not one per time point.
    answer = text[text.index(">The answer</h2>"):text.index(">QC problems</h2>")]
    assert answer.count("<tr>") == 2 and "movie.ome.tif, 4 time points" in answer
    assert "Flagged: A loses" in answer and ">Each pair in detail</h2>" not in text


def test_a_plain_result_has_no_stack_or_time_parts():
    from unmix.report.html import PROJECTION_CAUTION

    matrix = _matrix()
    text = build_report(matrix, coloc_records=[_record(matrix)])
    assert "r by depth" not in text and "over voxels" not in text and ">Time series</h2>" not in text
    assert html.escape(PROJECTION_CAUTION, quote=True) not in text and "over time" not in text
