"""The demo scenario: an invented specimen on an invented instrument, simulated.

The scenario (``configs/demo_scenario.toml``) describes three invented labels
on an invented widefield instrument: nuclei (Pondpetal), a filament network
(Fernlight) and puncta inside the nuclei (Emberin). Fernlight and Emberin are
placed independently, but Fernlight leaks strongly into Emberin's channel, so
the raw channels look overlapped; Pondpetal and Emberin truly overlap.

:func:`generate` simulates single-label controls (three fields per label, so
that the matrix intervals cover how fields differ), an unstained specimen, a
dark frame, a three-label sample and a small three-label z-stack through a
camera model (offset, gain, Poisson shot noise, Gaussian read noise, uneven
illumination, 12-bit saturation), seeded and deterministic, and saves the
ground truth beside them. Invented data: for demonstration and
self-consistency checks only.

Usage::

    python -m unmix.demo generate OUTDIR       # re-create the stacks
"""

from __future__ import annotations

import json
import tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..io.shipped import shipped_dir

SCENARIO_FILE = "demo_scenario.toml"


@dataclass(frozen=True)
class Scenario:
    """The parsed demo scenario; `folder` is where its files (the optics description) are."""

    raw: dict
    folder: Path

    @property
    def channels(self) -> list[str]:
        return [c["name"] for c in self.raw["channel"]]

    @property
    def labels(self) -> list[str]:
        return [lab["name"] for lab in self.raw["label"]]

    def described_optics(self):
        """The instrument as its users describe it (a :class:`unmix.optics.description.Description`)."""
        from ..optics.description import load_description

        return load_description(self.folder / self.raw["optics"]["description"])

    def built_optics(self):
        """The instrument as built: the description with the parts that really differ."""
        from ..optics.description import with_channel_parts

        description = self.described_optics()
        for channel, parts in self.raw["optics"].get("as_built", {}).items():
            description = with_channel_parts(description, channel, parts, f"{SCENARIO_FILE} [optics] as_built")
        return description

    def true_matrix(self) -> np.ndarray:
        """The true bleed-through matrix (channels x labels): predicted for the instrument as built."""
        from ..optics.prediction import predict

        matrix = predict(self.built_optics()).matrix
        rows = [matrix.channels.index(c) for c in self.channels]
        columns = [matrix.labels.index(label) for label in self.labels]
        return matrix.matrix[np.ix_(rows, columns)]

    def primary(self) -> dict:
        return {lab["name"]: lab["primary"] for lab in self.raw["label"]}


def load_scenario(path=None) -> Scenario:
    path = shipped_dir("configs") / SCENARIO_FILE if path is None else Path(path)
    return Scenario(tomllib.loads(path.read_text(encoding="utf-8")), path.parent)


def demo_stacks_dir() -> Path:
    """The folder of the shipped demo stacks (inside the installed package)."""
    return shipped_dir("demo_stacks")


# --- structures ----------------------------------------------------------------

def _nuclei(rng, shape, count):
    from skimage.draw import ellipse

    image = np.zeros(shape)
    masks = np.zeros(shape, dtype=bool)
    for _ in range(count):
        cy, cx = rng.uniform(20, shape[0] - 20), rng.uniform(20, shape[1] - 20)
        ry, rx = rng.uniform(12, 22), rng.uniform(12, 22)
        rr, cc = ellipse(cy, cx, ry, rx, shape=shape, rotation=rng.uniform(0, np.pi))
        image[rr, cc] = np.maximum(image[rr, cc], rng.uniform(0.6, 1.0))
        masks[rr, cc] = True
    return image, masks


def _filaments(rng, shape, count):
    image = np.zeros(shape)
    for _ in range(count):
        y, x = rng.uniform(0, shape[0]), rng.uniform(0, shape[1])
        angle = rng.uniform(0, 2 * np.pi)
        weight = rng.uniform(0.5, 1.0)
        for _ in range(int(rng.uniform(80, 260))):
            angle += rng.normal(0, 0.06)
            y, x = y + np.sin(angle), x + np.cos(angle)
            iy, ix = int(round(y)), int(round(x))
            if 0 <= iy < shape[0] and 0 <= ix < shape[1]:
                image[iy, ix] += weight
    return np.minimum(image, 1.5)


def _puncta(rng, shape, count, inside):
    image = np.zeros(shape)
    candidates = np.flatnonzero(inside)
    if candidates.size == 0:
        return image
    for index in rng.choice(candidates, size=count, replace=True):
        image.flat[index] += rng.uniform(0.6, 1.6)
    return image


def _normalised_blur(image, sigma):
    from scipy.ndimage import gaussian_filter

    blurred = gaussian_filter(image, sigma)
    peak = blurred.max()
    return blurred / peak if peak > 0 else blurred


def _specimen(rng, scenario: Scenario, shape, labels: list[str]) -> dict:
    """Abundance maps (electrons at the primary channel, before illumination) for `labels`."""
    sigma = scenario.raw["scenario"]["psf_sigma_px"]
    area = shape[0] * shape[1] / 65536
    nuclei, nuclear_mask = _nuclei(rng, shape, max(1, int(round(7 * area))))
    structures = {
        "nuclei": lambda: _normalised_blur(nuclei, sigma),
        "filaments": lambda: _normalised_blur(_filaments(rng, shape, int(round(40 * area))), sigma),
        "nuclear_puncta": lambda: _normalised_blur(
            _puncta(rng, shape, int(round(120 * area)), nuclear_mask), sigma) * 1.3,
    }
    maps = {}
    for lab in scenario.raw["label"]:
        # Every structure is drawn so that the random stream does not depend
        # on which labels are present; absent labels are then dropped.
        pattern = structures[lab["structure"]]()
        if lab["name"] in labels:
            maps[lab["name"]] = pattern * lab["brightness_electrons"]
    return maps


def _illumination(rng, shape, falloff):
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]]
    cy, cx = shape[0] * rng.uniform(0.4, 0.6), shape[1] * rng.uniform(0.4, 0.6)
    r2 = ((yy - cy) / shape[0]) ** 2 + ((xx - cx) / shape[1]) ** 2
    return 1.0 - falloff * r2 / 0.5


def _autofluorescence(rng, shape, scenario):
    from scipy.ndimage import gaussian_filter

    texture = gaussian_filter(rng.random(shape), 12)
    texture = (texture - texture.min()) / max(np.ptp(texture), 1e-12)
    auto = scenario.raw["autofluorescence"]
    return {c: auto["electrons"] * auto["spectrum"][c] * texture for c in scenario.channels}


def _camera(rng, electrons: np.ndarray, camera: dict, shot_noise: bool = True) -> np.ndarray:
    counts = rng.poisson(np.maximum(electrons, 0)) if shot_noise else np.zeros_like(electrons)
    adu = camera["offset_adu"] + camera["gain_adu_per_electron"] * (
        counts + rng.normal(0, camera["read_noise_electrons"], electrons.shape))
    return np.clip(np.round(adu), 0, camera["saturation_adu"]).astype(np.uint16)


def _specimen_stack(rng, scenario: Scenario, shape, labels: list[str]) -> dict:
    """Abundance volumes (Z, Y, X) for `labels`: the structures of :func:`_specimen` in 3-D.

    Nuclei are ellipses extruded over a few planes around their own depth, filaments lie at
    their own depth, puncta sit inside the nuclear volume; the optics blur in 3-D (wider in z).
    """
    from scipy.ndimage import gaussian_filter

    setup = scenario.raw["scenario"]
    n_z, plane = shape[0], tuple(shape[1:])
    area = plane[0] * plane[1] / 65536
    nuclei, nuclear = np.zeros(shape), np.zeros(shape, bool)
    for _ in range(max(1, int(round(12 * area)))):  # denser than a plane: a small stack shows a few
        image, mask = _nuclei(rng, plane, 1)
        centre, half = rng.uniform(2, n_z - 3), rng.uniform(1.5, 2.5)
        planes = np.abs(np.arange(n_z) - centre) <= half
        nuclei[planes] = np.maximum(nuclei[planes], image)
        nuclear[planes] |= mask
    filaments = np.zeros(shape)
    for _ in range(int(round(40 * area))):
        filaments[int(rng.integers(0, n_z))] += _filaments(rng, plane, 1)
    puncta = np.zeros(shape)
    candidates = np.flatnonzero(nuclear)
    for index in rng.choice(candidates, size=int(round(120 * area)), replace=True):
        puncta.flat[index] += rng.uniform(0.6, 1.6)
    sigma = (setup["psf_sigma_z_planes"], setup["psf_sigma_px"], setup["psf_sigma_px"])

    def blurred(volume):
        volume = gaussian_filter(volume, sigma)
        return volume / volume.max() if volume.max() > 0 else volume

    structures = {"nuclei": blurred(nuclei), "filaments": blurred(np.minimum(filaments, 1.5)),
                  "nuclear_puncta": blurred(puncta) * 1.3}
    return {lab["name"]: structures[lab["structure"]] * lab["brightness_electrons"]
            for lab in scenario.raw["label"] if lab["name"] in labels}


def simulate(scenario: Scenario, shape, labels: list[str], rng, *, autofluorescence=True,
             brightness_scale: float = 1.0):
    """Simulate one field: raw counts (C, Y, X) uint16 and true abundances (K, Y, X).

    Abundances are in ADU of background-subtracted signal in each label's
    primary channel, illumination included (what unmixing should return).
    A 3-D `shape` (Z, Y, X) simulates a z-stack: raw (C, Z, Y, X), abundances (K, Z, Y, X).
    """
    camera = scenario.raw["camera"]
    shape = tuple(shape)
    maps = (_specimen_stack if len(shape) == 3 else _specimen)(rng, scenario, shape, labels)
    illumination = _illumination(rng, shape[-2:], camera["illumination_falloff"])
    auto = _autofluorescence(rng, shape, scenario) if autofluorescence else {}
    matrix = scenario.true_matrix()
    raw = []
    for c, channel in enumerate(scenario.channels):
        electrons = sum(matrix[c, scenario.labels.index(name)] * brightness_scale * maps[name] * illumination
                        for name in labels) if labels else np.zeros(shape)
        electrons = electrons + auto.get(channel, 0.0)
        raw.append(_camera(rng, electrons, camera))
    truth = np.stack([maps[name] * brightness_scale * illumination * camera["gain_adu_per_electron"]
                      for name in labels]).astype(np.float32) if labels else None
    return np.stack(raw), truth


def generate(outdir, scenario: Scenario | None = None) -> list[Path]:
    """Write the demo stacks and their ground truth to `outdir`."""
    from ..io.images import Image, write_ome_tiff

    scenario = scenario or load_scenario()
    outdir = Path(outdir)
    outdir.mkdir(parents=True, exist_ok=True)
    setup = scenario.raw["scenario"]
    camera = scenario.raw["camera"]
    rng = np.random.default_rng(setup["seed"])
    size = {"X": setup["pixel_size_um"], "Y": setup["pixel_size_um"]}
    channels = tuple(scenario.channels)
    control_shape = tuple(setup["control_shape"])
    written = []

    def save(name, data, names, what):
        image = Image(data=data, axes="CYX" if data.ndim == 3 else "CZYX", channel_names=tuple(names),
                      pixel_size=size if data.ndim == 3 else {**size, "Z": setup["z_step_um"]})
        written.append(write_ome_tiff(outdir / name, image, compression="zlib", provenance={
            "demo": setup["lab"], "instrument": setup["instrument"], "content": what,
            "note": "simulated, invented scenario"}))

    for label in scenario.labels:
        for f in range(setup["control_fields"]):
            raw, _ = simulate(scenario, control_shape, [label], rng)
            save(f"control_{label}_field{f + 1}.ome.tif", raw, channels, f"single-label control of {label}")
    unstained, _ = simulate(scenario, control_shape, [], rng)
    save("unstained.ome.tif", unstained, channels, "unlabelled specimen")
    dark = np.stack([_camera(rng, np.zeros(control_shape), camera, shot_noise=False) for _ in channels])
    save("dark.ome.tif", dark, channels, "dark frame")
    sample, truth = simulate(scenario, tuple(setup["sample_shape"]), scenario.labels, rng)
    save("sample.ome.tif", sample, channels, "three-label sample")
    save("sample_truth.ome.tif", truth, scenario.labels, "true abundances of the sample (ADU in primary channel)")
    stack, stack_truth = simulate(scenario, tuple(setup["stack_shape"]), scenario.labels, rng)
    save("sample_stack.ome.tif", stack, channels, "three-label z-stack sample")
    save("sample_stack_truth.ome.tif", stack_truth, scenario.labels,
         "true abundances of the z-stack sample (ADU in primary channel)")
    truth_file = outdir / "truth.json"
    truth_file.write_text(json.dumps({
        "scenario": setup, "camera": camera, "channels": scenario.channels, "labels": scenario.labels,
        "primary": scenario.primary(), "matrix": scenario.true_matrix().tolist(),
        "background_adu": {c: camera["offset_adu"] for c in scenario.channels},
        "pairs": scenario.raw["pairs"],
    }, indent=2) + "\n", encoding="utf-8")
    written.append(truth_file)
    return written


def demo_inputs(stacks: Path | None = None) -> dict:
    """Paths of the shipped demo stacks, by role."""
    stacks = stacks or demo_stacks_dir()
    scenario = load_scenario()
    fields = scenario.raw["scenario"]["control_fields"]
    return {
        "controls": {label: [stacks / f"control_{label}_field{f + 1}.ome.tif" for f in range(fields)]
                     for label in scenario.labels},
        "unstained": stacks / "unstained.ome.tif",
        "dark": stacks / "dark.ome.tif",
        "sample": stacks / "sample.ome.tif",
        "sample_stack": stacks / "sample_stack.ome.tif",
        "truth": stacks / "truth.json",
    }
