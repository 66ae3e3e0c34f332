"""Large fuzzing budget: mutated matrix, description, spectrum and TIFF files, and coloc results
given to `report`, fed to every reader in-process (default 10,000 examples each; a coloc file is
loaded and built into a report; half the matrix and coloc examples keep valid JSON with one value
of another type somewhere) and to the command line in subprocesses (default 300).

Passes when no reader raises anything but InputError and no command exits with a code other than
0 or 2 or prints a traceback. Prints the counts.

    python tests/benchmarks/fuzz_readers.py [--examples 10000] [--cli-runs 300]
"""

from __future__ import annotations

import argparse
import collections
import random
import subprocess
import sys
import tempfile
import traceback
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from test_reliability import _seed_files, mutate, read_with  # noqa: E402

from unmix.errors import InputError  # noqa: E402

NUMBERS = [b"1e309", b"-1e309", b"NaN", b"-0", b"99999999999999999999", b"1e-320", b"\"x\"", b"[]", b"{}"]


def random_mutation(rng: random.Random):
    kind = rng.choice(["flip", "truncate", "insert", "number"])
    position = rng.randrange(10**6)
    if kind == "flip":
        return kind, position, rng.randrange(8)
    if kind == "truncate":
        return kind, position, 0
    if kind == "insert":
        return kind, position, bytes(rng.randrange(256) for _ in range(rng.randint(1, 16)))
    return kind, position, rng.choice(NUMBERS)


def mutated(original: bytes, rng: random.Random) -> bytes:
    data = original
    for _ in range(rng.randint(1, 4)):
        data = mutate(data, random_mutation(rng))
    return data


ODD_VALUES = ["0.5", "", [], {}, None, True, 5, -1, 10**400, [0.1], [[0.1, 0.2]], {"pearson": "x"}]


def restructured(original: bytes, rng: random.Random) -> bytes:
    """The JSON document with one value, anywhere in its tree, replaced by a value of another
    type (or a deep nest): mistakes that keep the file valid JSON."""
    import json

    document = json.loads(original)
    slots = []

    def walk(node):
        items = node.items() if isinstance(node, dict) else enumerate(node) if isinstance(node, list) else []
        for key, value in items:
            slots.append((node, key))
            walk(value)

    walk(document)
    node, key = rng.choice(slots)
    node[key] = rng.choice(ODD_VALUES + ["\0deep"])
    return json.dumps(document).replace('"\\u0000deep"', "[" * 5000 + "]" * 5000).encode()


def coloc_seeds(folder: Path, matrix: Path) -> dict:
    """Coloc results files as `unmix coloc --json` writes them, by kind: a 2-D image (the shipped
    demo sample), a z-stack (the demo stack, judged in 3-D) and a short time series made here
    from the demo sample (four frames, the labels fading), whose file also holds its summary."""
    import numpy as np

    from unmix.cli import main as cli
    from unmix.demo import demo_inputs
    from unmix.io.images import Image, read_image, write_ome_tiff

    inputs = demo_inputs()
    sample = read_image(inputs["sample"])
    frames = np.stack([sample.data.astype(np.float32) * 0.9**t for t in range(4)])
    series = folder / "series.ome.tif"
    write_ome_tiff(series, Image(frames, "T" + sample.axes, sample.channel_names, sample.pixel_size))
    seeds = {}
    for kind, image in (("coloc", inputs["sample"]), ("coloc-stack", inputs["sample_stack"]), ("coloc-time", series)):
        path = folder / f"{kind}.json"
        code = cli(["coloc", str(image), "--matrix", str(matrix), "--labels", "Pondpetal,Emberin",
                    "--labels", "Fernlight,Emberin", "--rounds", "19", "--json", str(path), "--quiet"])
        assert code == 0, kind
        seeds[kind] = path
    return seeds


def read_coloc(matrix: Path, path: Path):
    """What `report --coloc` does with the file, short of writing the page."""
    from unmix.matrix import load_matrix
    from unmix.report.html import build_report, load_coloc_results

    records, summaries = load_coloc_results(path)
    return build_report(load_matrix(matrix), coloc_records=records, time_summaries=summaries)


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--examples", type=int, default=10_000)
    parser.add_argument("--cli-runs", type=int, default=300)
    args = parser.parse_args()
    rng = random.Random(0)
    failures = 0
    crashes = collections.Counter()  # kind, exception and where in unmix -> count
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        seeds = _seed_files(folder)
        seeds.update(coloc_seeds(folder, seeds["matrix"]))
        originals = {kind: Path(path).read_bytes() for kind, path in seeds.items()}
        for kind, path in seeds.items():
            target = folder / f"fuzz_{Path(path).name}"
            counts = {"accepted": 0, "refused": 0, "crashed": 0}
            for example in range(args.examples):
                structural = (kind == "matrix" or kind.startswith("coloc")) and example % 2 == 1
                target.write_bytes(restructured(originals[kind], rng) if structural
                                   else mutated(originals[kind], rng))
                try:
                    if kind.startswith("coloc"):
                        read_coloc(seeds["matrix"], target)
                    else:
                        read_with(kind, target)
                    counts["accepted"] += 1
                except InputError:
                    counts["refused"] += 1
                except Exception as exc:  # noqa: BLE001 - what the fuzzing looks for
                    counts["crashed"] += 1
                    frames = [f for f in traceback.extract_tb(exc.__traceback__) if "/unmix/" in f.filename]
                    where = f"{Path(frames[-1].filename).name}:{frames[-1].lineno}" if frames else "?"
                    crashes[f"{kind}: {type(exc).__name__} at {where}"] += 1
            failures += counts["crashed"]
            print(f"{kind}: {args.examples} examples: {counts['accepted']} read, {counts['refused']} refused "
                  f"with a clear error, {counts['crashed']} other exceptions")
        commands = {
            "matrix": lambda p: ["report", "--matrix", str(p), "-o", str(folder / "r.html")],
            "description": lambda p: ["predict", "--config", str(p), "-o", str(folder / "p.json")],
            "image": lambda p: ["apply", "--matrix", str(seeds["matrix"]), str(p), "-o", str(folder / "out"),
                                "--overwrite"],
            **{kind: lambda p: ["report", "--matrix", str(seeds["matrix"]), "--coloc", str(p), "-o",
                                str(folder / "r.html")] for kind in ("coloc", "coloc-stack", "coloc-time")},
        }
        codes = {"0": 0, "2": 0, "other": 0, "traceback": 0}
        for run in range(args.cli_runs):
            kind = list(commands)[run % len(commands)]
            target = folder / f"cli_{Path(seeds[kind]).name}"
            target.write_bytes(mutated(originals[kind], rng))
            if kind == "description":
                (folder / "em.csv").write_bytes(originals["spectrum"])
            result = subprocess.run([sys.executable, "-m", "unmix.cli", *commands[kind](target), "--quiet"],
                                    capture_output=True, text=True)
            key = str(result.returncode) if result.returncode in (0, 2) else "other"
            codes[key] += 1
            if "Traceback" in result.stderr:
                codes["traceback"] += 1
            if key == "other" or "Traceback" in result.stderr:
                print(f"{kind}: exit {result.returncode}: {result.stderr[-500:]}")
        failures += codes["other"] + codes["traceback"]
        print(f"command line: {args.cli_runs} runs: exit 0 {codes['0']}, exit 2 {codes['2']}, "
              f"other exit codes {codes['other']}, tracebacks {codes['traceback']}")
    for signature, count in crashes.most_common():
        print(f"  {count} x {signature}")
    print("result:", "no crash" if failures == 0 else f"{failures} FAILURES")
    return 1 if failures else 0


if __name__ == "__main__":
    raise SystemExit(main())
