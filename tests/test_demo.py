"""The demo scenario: deterministic generation, shipped stacks, and the end-to-end run."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from unmix.demo import generate, run_demo
from unmix.io.images import read_image


def test_generator_reproduces_the_shipped_stacks(tmp_path, demo):
    # Seeded and deterministic: regenerating gives the shipped pixels.
    generate(tmp_path)
    shipped = Path(demo["sample"]).parent
    for name in ["control_Pondpetal_field1.ome.tif", "control_Emberin_field3.ome.tif", "unstained.ome.tif",
                 "dark.ome.tif", "sample.ome.tif", "sample_truth.ome.tif", "sample_stack.ome.tif",
                 "sample_stack_truth.ome.tif"]:
        new, old = read_image(tmp_path / name), read_image(shipped / name)
        assert new.channel_names == old.channel_names
        assert new.axes == old.axes and new.pixel_size == old.pixel_size
        np.testing.assert_allclose(new.data.astype(float), old.data.astype(float), atol=1.0)
    assert json.loads((tmp_path / "truth.json").read_text()) == json.loads(demo["truth"].read_text())


def test_demo_has_a_falsely_and_a_truly_overlapping_pair(demo):
    # Raw channels: the independent pair correlates through bleed-through alone;
    # the true abundances show that it does not, while the other pair does.
    # Reference for r: scipy.stats.pearsonr.
    from scipy.stats import pearsonr

    truth = json.loads(demo["truth"].read_text())
    raw = read_image(demo["sample"]).data.astype(float)
    abundances = read_image(Path(demo["sample"]).with_name("sample_truth.ome.tif")).data
    labels, channels, primary = truth["labels"], truth["channels"], truth["primary"]

    def raw_channel(label):
        return raw[channels.index(primary[label])].ravel()

    def true_abundance(label):
        return abundances[labels.index(label)].ravel()

    a, b = truth["pairs"]["independent_but_bleeding"]
    assert pearsonr(raw_channel(a), raw_channel(b))[0] > 0.3
    assert abs(pearsonr(true_abundance(a), true_abundance(b))[0]) < 0.1
    a, b = truth["pairs"]["truly_overlapping"]
    assert pearsonr(true_abundance(a), true_abundance(b))[0] > 0.3


def test_demo_ships_three_control_fields_per_label_and_a_z_stack(demo):
    # Three fields per label: the matrix intervals then cover how fields differ (random effects).
    assert all(len(paths) == 3 and all(Path(p).exists() for p in paths) for paths in demo["controls"].values())
    stack = read_image(demo["sample_stack"])
    truth = read_image(Path(demo["sample_stack"]).with_name("sample_stack_truth.ome.tif"))
    assert stack.axes == "CZYX" and stack.data.shape == (3, 8, 128, 128) and stack.pixel_size["Z"] > 0
    assert truth.data.shape == stack.data.shape and truth.channel_names == tuple(json.loads(
        demo["truth"].read_text())["labels"])
    # The same two pairs as the plane, in 3-D over the voxels (reference: scipy.stats.pearsonr).
    from scipy.stats import pearsonr

    pairs = json.loads(demo["truth"].read_text())["pairs"]
    labels = list(truth.channel_names)
    values = truth.data.astype(float)

    def r(pair):
        return pearsonr(values[labels.index(pair[0])].ravel(), values[labels.index(pair[1])].ravel())[0]

    assert abs(r(pairs["independent_but_bleeding"])) < 0.1 and r(pairs["truly_overlapping"]) > 0.3
    # Every plane holds structure of every label (a stack, not one plane and empty ones).
    assert np.all(values.reshape(3, 8, -1).max(axis=2) > 0)


def _stack_truth(demo, pair):
    """Pearson r (scipy.stats.pearsonr) over the z-stack's voxels of the pair's simulated abundances, and
    of the noise-free primary channels the true matrix makes of them: what bleed-through alone does."""
    from scipy.stats import pearsonr

    truth = json.loads(demo["truth"].read_text())
    abundances = read_image(Path(demo["sample_stack"]).with_name("sample_stack_truth.ome.tif")).data
    abundances = abundances.astype(float).reshape(len(truth["labels"]), -1)
    channels = np.asarray(truth["matrix"]) @ abundances
    ka, kb = (truth["labels"].index(label) for label in pair)
    ca, cb = (truth["channels"].index(truth["primary"][label]) for label in pair)
    return pearsonr(abundances[ka], abundances[kb])[0], pearsonr(channels[ca], channels[cb])[0]


def test_stack_truth_gives_the_verdicts_the_demo_pins(demo):
    # The outside reference for the demo's 3-D verdicts is the scenario's simulated truth: the
    # independent pair does not overlap (|r| < 0.1) while bleed-through alone makes its channels
    # correlate (bleed-through-only); the overlapping pair overlaps (r >= 0.1) and bleed-through
    # raises its channels' r above the labels' own by more than the after-r's 95 % interval is wide
    # in the demo (about 0.006), so the raw channels overstate it (inflated).
    labels, channels = _stack_truth(demo, ("Fernlight", "Emberin"))
    assert abs(labels) < 0.1 and channels > 0.3
    labels, channels = _stack_truth(demo, ("Pondpetal", "Emberin"))
    assert labels >= 0.1 and channels - labels > 0.01


def test_demo_runs_twice_in_a_row_into_one_folder(tmp_path):
    # A rerun replaces the demo's own results and leaves other files alone (a real process, as a
    # user runs it).
    folder = tmp_path / "demo"
    folder.mkdir()
    (folder / "notes.txt").write_text("mine")
    runs = [subprocess.run([sys.executable, "-m", "unmix.cli", "demo", "-o", str(folder)], capture_output=True,
                           text=True) for _ in range(2)]
    for run in runs:
        assert run.returncode == 0 and "error" not in run.stderr, run.stderr
        assert "Report:" in run.stdout
    assert (folder / "notes.txt").read_text() == "mine"
    assert not [p for p in folder.rglob("*") if ".partial" in p.name]
    unmixed = read_image(folder / "unmixed" / "sample.unmixed.ome.tif")
    assert unmixed.channel_names == ("Pondpetal", "Fernlight", "Emberin")


def test_run_demo_writes_results(tmp_path, capsys):
    result = run_demo(tmp_path / "out")
    assert result["matrix"].exists() and result["csv"].exists()
    assert result["truth_inside_ci"] == result["coefficients"] == 9
    assert result["unmixed"].exists()
    assert all(error < 40 for error in result["rms_error"].values())  # shot noise of ~1000 e- peaks
    assert "Bleed-through matrix" in capsys.readouterr().out
    # The shipped demo's orange600 cube holds another emission filter than described:
    # measured versus predicted points at that channel and only its row disagrees.
    assert result["likely_channel"] == "orange600"
    disagreeing = {key for key, verdict in result["verdicts"].items() if verdict in ("higher", "lower")}
    assert disagreeing and all(channel == "orange600" for channel, _ in disagreeing)
    assert result["verdicts"][("green525", "Pondpetal")] == "agrees"
    assert (result["compare"] / "compare.json").exists()
    # The demo's pairs: the independent one is flagged, the overlapping one is not.
    assert result["coloc"][("Fernlight", "Emberin")] == "bleed-through-only"
    assert result["coloc"][("Pondpetal", "Emberin")] == "persists"
    # The z-stack, judged in 3-D over its voxels. Reference: the scenario's simulated truth
    # (test_stack_truth_gives_the_verdicts_the_demo_pins): Fernlight and Emberin independent,
    # Pondpetal and Emberin overlapping with their channels' r raised by bleed-through.
    assert result["coloc_stack"][("Fernlight", "Emberin")] == "bleed-through-only"
    assert result["coloc_stack"][("Pondpetal", "Emberin")] == "inflated"
    stack = json.loads((tmp_path / "out" / "coloc_stack.json").read_text())["results"]
    assert all(r["planes"] == [0, 7] and len(r["plane_profile"]) == 8 and r["z_step_um"] == pytest.approx(0.3)
               for r in stack)
    assert result["report"].exists()
    # The one QC flag of the demo, a false non-linearity flag on a linear detector, as the README
    # describes it (the rate of such flags on linear controls: tests/test_measure.py, and on controls like
    # these, tests/benchmarks/bench_linearity_specimen.py).
    from unmix.matrix import load_matrix

    qc = load_matrix(result["matrix"]).qc
    ratio = [qc[key][2][0] for key in ("linearity_ratio", "linearity_ratio_low", "linearity_ratio_high")]
    text = f"slope ratio {ratio[0]:.2f}, 95 % interval {ratio[1]:.2f} to {ratio[2]:.2f}"
    assert ratio[1] > 1 and text in (Path(__file__).parents[1] / "README.md").read_text()
    # Run again into the same folder: the demo replaces its own results.
    assert run_demo(tmp_path / "out")["unmixed"].exists()


@pytest.mark.slow
def test_demo_runs_after_a_non_editable_install(tmp_path):
    # The shipped stacks and configs must travel inside the built package.
    root = Path(__file__).resolve().parents[1]
    target = tmp_path / "site"
    subprocess.run([sys.executable, "-m", "pip", "install", "--quiet", "--no-deps",
                    "--target", str(target), str(root)], check=True, cwd=tmp_path)
    env = {**os.environ, "PYTHONPATH": str(target)}
    run = subprocess.run([sys.executable, "-c", "import sys, unmix.cli; sys.exit(unmix.cli.main())",
                          "demo", "-o", str(tmp_path / "demo")], capture_output=True, text=True, cwd=tmp_path,
                         env=env)
    assert run.returncode == 0, run.stderr
    assert str(target) in subprocess.run(
        [sys.executable, "-c", "import unmix; print(unmix.__file__)"], capture_output=True, text=True,
        cwd=tmp_path, env=env).stdout
    assert (tmp_path / "demo" / "demo_matrix.json").exists()
