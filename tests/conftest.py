"""Shared fixtures: the shipped demo stacks and small synthetic controls."""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pytest

from unmix.demo import demo_inputs, load_scenario, simulate
from unmix.io.images import Image, write_ome_tiff


@pytest.fixture(scope="session")
def demo():
    """Paths of the shipped demo stacks, by role."""
    return demo_inputs()


@pytest.fixture(scope="session")
def scenario():
    return load_scenario()


def make_control(scenario, label, seed, shape=(128, 128), brightness_scale=1.0, autofluorescence=True):
    """One simulated single-label control field as an Image (invented data)."""
    raw, _ = simulate(scenario, shape, [label], np.random.default_rng(seed),
                      brightness_scale=brightness_scale, autofluorescence=autofluorescence)
    return Image(raw, "CYX", tuple(scenario.channels))


def save(path: Path, image: Image) -> Path:
    write_ome_tiff(path, image)
    return path


def fingerprint(paths) -> dict:
    """sha256 and mtime of each file, to prove that inputs are never modified."""
    result = {}
    for path in paths:
        path = Path(path)
        result[str(path)] = (hashlib.sha256(path.read_bytes()).hexdigest(), path.stat().st_mtime_ns)
    return result
