"""Image I/O checked against the reference readers and writers (tifffile, ome-zarr)."""

from __future__ import annotations

import os

import numpy as np
import pytest
import tifffile

from unmix.errors import InputError
from unmix.io.images import DeferredArray, Image, read_image, read_images, read_provenance, write_ome_tiff, write_ome_zarr


@pytest.fixture
def stack():
    rng = np.random.default_rng(1)
    return rng.integers(0, 4096, size=(2, 3, 24, 32), dtype=np.uint16)  # Z C Y X


def test_ome_tiff_round_trip_matches_tifffile(tmp_path, stack):
    # Reference: tifffile's own reader returns the same pixels in the stored order.
    image = Image(np.moveaxis(stack, 1, 0), "CZYX", ("a", "b", "c"), {"X": 0.1, "Y": 0.1, "Z": 0.5})
    path = write_ome_tiff(tmp_path / "x.ome.tif", image, provenance={"note": "<&>"})
    back = read_image(path)
    assert back.axes == "CZYX" and back.channel_names == ("a", "b", "c")
    assert back.pixel_size == {"X": 0.1, "Y": 0.1, "Z": 0.5}
    np.testing.assert_array_equal(back.data, image.data)
    with tifffile.TiffFile(path) as tif:
        assert tif.is_ome and tif.series[0].axes == "CZYX"
        np.testing.assert_array_equal(tif.series[0].asarray(), image.data)
    assert read_provenance(path) == {"note": "<&>"}


def test_axes_from_ome_metadata_are_put_in_canonical_order(tmp_path, stack):
    # Reference: tifffile writes the OME axes ZCYX as given.
    tifffile.imwrite(tmp_path / "z.ome.tif", stack, ome=True,
                     metadata={"axes": "ZCYX", "Channel": {"Name": ["p", "q", "r"]}})
    image = read_image(tmp_path / "z.ome.tif")
    assert image.axes == "CZYX" and image.channel_names == ("p", "q", "r")
    np.testing.assert_array_equal(image.data, np.moveaxis(stack, 1, 0))


def test_hyperstack_tiff_axes(tmp_path):
    # Reference: tifffile writes TZCYX hyperstack metadata (its hyperstack flavour of TIFF).
    data = np.arange(2 * 3 * 2 * 8 * 9, dtype=np.uint16).reshape(2, 3, 2, 8, 9)
    tifffile.imwrite(tmp_path / "hyperstack.tif", data, imagej=True, metadata={"axes": "TZCYX"})
    image = read_image(tmp_path / "hyperstack.tif")
    assert image.axes == "TCZYX"
    np.testing.assert_array_equal(image.data, np.moveaxis(data, 2, 1))


def test_plain_tiff_rules_and_axes_override(tmp_path, stack):
    tifffile.imwrite(tmp_path / "c.tif", stack[0], metadata=None)
    image = read_image(tmp_path / "c.tif")
    assert image.axes == "CYX" and image.channel_names == ("ch0", "ch1", "ch2")
    tifffile.imwrite(tmp_path / "four.tif", stack, metadata=None)
    with pytest.raises(InputError, match="--axes"):
        read_image(tmp_path / "four.tif")
    image = read_image(tmp_path / "four.tif", axes="ZCYX", channel_names=["x", "y", "z"])
    assert image.axes == "CZYX" and image.channel_names == ("x", "y", "z")
    with pytest.raises(InputError, match="one letter per dimension"):
        read_image(tmp_path / "four.tif", axes="CYX")
    with pytest.raises(InputError, match="one name per channel"):
        read_image(tmp_path / "c.tif", channel_names=["x", "y"])


def test_lazy_reading_gives_dask_array_equal_to_eager(tmp_path, stack):
    tifffile.imwrite(tmp_path / "z.ome.tif", stack, ome=True, metadata={"axes": "ZCYX"})
    lazy = read_image(tmp_path / "z.ome.tif", lazy=True)
    import dask.array as da

    assert isinstance(lazy.data.materialised(), da.Array)
    eager = read_image(tmp_path / "z.ome.tif")
    np.testing.assert_array_equal(np.asarray(lazy.data), eager.data)
    # The recorded axis move and channel choice give what numpy gives on the eager pixels.
    chosen = lazy.select_channels(["ch2", "ch0"])
    assert isinstance(chosen.data, DeferredArray) and chosen.data.shape == (2,) + stack.shape[:1] + stack.shape[2:]
    np.testing.assert_array_equal(np.asarray(chosen.data), eager.select_channels(["ch2", "ch0"]).data)
    np.testing.assert_array_equal(np.asarray(chosen.data[1, 0, 2:5]), eager.data[[2, 0]][1, 0, 2:5])


@pytest.mark.parametrize("key", [None, (None,), (slice(None), [2, 0]), ([1],), (slice(None), None, [0, 0, 1]),
                                 (None, slice(None), slice(None), slice(None), slice(None))])
def test_deferred_shape_of_whole_axis_keys_is_numpys(key):
    # Reference: numpy's own indexing of an array of the same shape.
    reference = np.zeros((2, 3, 4, 5))
    assert DeferredArray(lambda: reference, reference.shape, reference.dtype)[key].shape == reference[key].shape
    assert DeferredArray(lambda: reference, reference.shape, reference.dtype).transpose((2, 0, 3, 1)).shape == (
        reference.transpose((2, 0, 3, 1)).shape)


def test_opening_a_tiff_for_block_reading_imports_no_dask(tmp_path, stack):
    # apply opens every input and reads it page by page: dask and zarr would cost ~0.6 s a run.
    import subprocess
    import sys

    tifffile.imwrite(tmp_path / "z.ome.tif", stack, ome=True, metadata={"axes": "ZCYX"})
    code = ("import sys; from unmix.io.images import open_images, read_block\n"
            f"with open_images({str(tmp_path / 'z.ome.tif')!r}) as images:\n"
            "    image = images[0].select_channels(['ch1', 'ch0'])\n"
            "    block = read_block(image.source, 0, (slice(None), 0, slice(None), slice(None)), channels=['ch1', 'ch0'])\n"
            "print(block.shape, 'dask' in sys.modules, 'zarr' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.split() == ["(2,", "24,", "32)", "False", "False"], out


def test_several_series_are_read_one_by_one(tmp_path, stack):
    with tifffile.TiffWriter(tmp_path / "m.ome.tif", ome=True) as writer:
        for z in range(2):
            writer.write(stack[z], metadata={"axes": "CYX", "Channel": {"Name": ["a", "b", "c"]}})
    images = read_images(tmp_path / "m.ome.tif")
    assert [im.series for im in images] == [0, 1]
    np.testing.assert_array_equal(images[1].data, stack[1])


def test_ome_zarr_written_by_reference_writer_is_read(tmp_path, stack):
    # Reference: ome-zarr's writer (NGFF metadata).
    import zarr
    from ome_zarr.writer import write_image

    data = np.moveaxis(stack, 1, 0)
    group = zarr.open_group(str(tmp_path / "r.ome.zarr"), mode="w")
    write_image(data, group=group, axes="czyx", scaler=None)
    image = read_image(tmp_path / "r.ome.zarr")
    assert image.axes == "CZYX"
    np.testing.assert_array_equal(image.data, data)


def test_our_ome_zarr_is_read_by_reference_reader(tmp_path, stack):
    # Reference: ome-zarr's reader finds the image and its axes.
    from ome_zarr.io import parse_url
    from ome_zarr.reader import Reader

    image = Image(np.moveaxis(stack, 1, 0), "CZYX", ("a", "b", "c"), {"X": 0.2, "Y": 0.2, "Z": 1.0})
    path = write_ome_zarr(tmp_path / "o.ome.zarr", image, provenance={"k": 1})
    nodes = list(Reader(parse_url(str(path)))())
    np.testing.assert_array_equal(np.asarray(nodes[0].data[0]), image.data)
    back = read_image(path)
    assert back.channel_names == ("a", "b", "c") and back.pixel_size["X"] == pytest.approx(0.2)


@pytest.mark.parametrize("content", [b"", b"not an image at all", b"II*\x00" + b"\x00" * 20])
def test_damaged_files_raise_input_error_naming_them(tmp_path, content):
    path = tmp_path / "bad.tif"
    path.write_bytes(content)
    with pytest.raises(InputError, match="bad.tif"):
        read_image(path)


def test_truncated_tiff_raises_input_error(tmp_path, stack):
    tifffile.imwrite(tmp_path / "t.ome.tif", stack, ome=True, metadata={"axes": "ZCYX"})
    data = (tmp_path / "t.ome.tif").read_bytes()
    (tmp_path / "cut.ome.tif").write_bytes(data[: len(data) // 2])
    with pytest.raises(InputError, match="cut.ome.tif"):
        read_image(tmp_path / "cut.ome.tif")


def test_failed_write_leaves_nothing_behind(tmp_path, monkeypatch):
    image = Image(np.zeros((2, 8, 8), np.float32), "CYX", ("a", "b"))

    def explode(*args, **kwargs):
        raise OSError("disk full")

    monkeypatch.setattr(tifffile, "imwrite", explode)
    with pytest.raises(OSError):
        write_ome_tiff(tmp_path / "out.ome.tif", image)
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("layout", ["ome-zcyx", "ome-tczyx", "hyperstack-tzcyx", "plain-cyx", "axes-override", "rgb",
                                    "planar-cyx"])
def test_read_block_equals_the_lazy_array(tmp_path, layout):
    # Reference: tifffile's own reading of the whole series (through read_images), for page
    # layouts that read_block maps to pages and for one it must hand to the lazy array (RGB).
    import tifffile

    from unmix.io.images import close_block_sources, read_block

    rng = np.random.default_rng(1)
    path = tmp_path / "stack.tif"
    axes = None
    if layout == "ome-zcyx":
        tifffile.imwrite(path, rng.integers(0, 4000, (5, 3, 16, 20), dtype=np.uint16), ome=True,
                         metadata={"axes": "ZCYX", "Channel": {"Name": ["a", "b", "c"]}})
    elif layout == "ome-tczyx":
        tifffile.imwrite(path, rng.random((2, 3, 4, 16, 20), dtype=np.float32), ome=True,
                         metadata={"axes": "TCZYX", "Channel": {"Name": ["a", "b", "c"]}})
    elif layout == "hyperstack-tzcyx":
        tifffile.imwrite(path, rng.integers(0, 255, (2, 4, 3, 16, 20), dtype=np.uint8), imagej=True,
                         metadata={"axes": "TZCYX"})
    elif layout == "plain-cyx":
        tifffile.imwrite(path, rng.integers(0, 4000, (3, 16, 20), dtype=np.uint16), photometric="minisblack")
    elif layout == "axes-override":
        tifffile.imwrite(path, rng.integers(0, 4000, (4, 3, 16, 20), dtype=np.uint16), photometric="minisblack")
        axes = "ZCYX"
    elif layout == "planar-cyx":  # one page holding three planes
        tifffile.imwrite(path, rng.integers(0, 4000, (3, 16, 20), dtype=np.uint16), photometric="rgb",
                         planarconfig="separate")
    else:
        tifffile.imwrite(path, rng.integers(0, 255, (16, 20, 3), dtype=np.uint8), photometric="rgb")
    image = read_images(path, axes=axes)[0]
    names = list(image.channel_names)
    chosen = [names[2], names[0]] if len(names) > 2 else names[::-1]
    reference = image.select_channels(chosen)
    leading = [a for a in reference.axes if a not in "CYX"]
    for position in np.ndindex(*[reference.data.shape[reference.axes.index(a)] for a in leading]):
        it = iter(position)
        key = tuple(next(it) if a not in "CYX" else slice(None) for a in reference.axes)
        block = read_block(path, 0, key, channels=chosen, axes=axes)
        np.testing.assert_array_equal(block, reference.data[key])
    close_block_sources()


def test_read_block_sees_a_replaced_file(tmp_path):
    import tifffile

    from unmix.io.images import close_block_sources, read_block

    path = tmp_path / "s.tif"
    tifffile.imwrite(path, np.zeros((2, 8, 8), np.uint16))
    key = (slice(None), slice(None), slice(None))
    assert read_block(path, 0, key, channels=["ch0", "ch1"]).max() == 0
    os.utime(path, ns=(1, 1))  # a different modification time, as a copy over the file would give
    tifffile.imwrite(path, np.full((2, 8, 8), 7, np.uint16))
    assert read_block(path, 0, key, channels=["ch0", "ch1"]).max() == 7
    close_block_sources()


def _being_written(path, planes: int = 6) -> None:
    """A copy of a TIFF taken while tifffile is still writing it (its pages not yet complete)."""
    import shutil
    import threading

    pause, copied = threading.Event(), threading.Event()

    def data():
        for index in range(planes):
            if index == planes // 2:
                copied.wait()
            yield np.zeros((32, 32), np.uint16)

    writing = path.with_name("writing-" + path.name)

    def write():
        with tifffile.TiffWriter(writing) as writer:
            writer.write(data(), shape=(planes, 32, 32), dtype=np.uint16, photometric="minisblack")

    thread = threading.Thread(target=write)
    thread.start()
    while not writing.exists() or writing.stat().st_size < 8:
        pause.wait(0.01)
    pause.wait(0.2)
    shutil.copy(writing, path)
    copied.set()
    thread.join()


def test_a_tiff_still_being_written_is_called_so(tmp_path):
    _being_written(tmp_path / "acquiring.tif")
    with pytest.raises(InputError, match="still being written") as info:
        read_images(tmp_path / "acquiring.tif")
    assert "--axes" not in str(info.value)


def test_rgb_samples_are_three_channels(tmp_path):
    # tifffile reports the axes of an RGB page as YXS: the samples are the channels.
    tifffile.imwrite(tmp_path / "rgb.tif", np.zeros((384, 256, 3), np.uint8), photometric="rgb")
    image = read_image(tmp_path / "rgb.tif")
    assert image.axes == "CYX" and image.data.shape == (3, 384, 256)


def test_unusable_channel_names_are_a_warning_naming_them(tmp_path):
    from unmix.errors import InputWarning

    tifffile.imwrite(tmp_path / "dup.ome.tif", np.zeros((3, 8, 8), np.uint16), ome=True,
                     metadata={"axes": "CYX", "Channel": {"Name": ["a", "a", ""]}})
    with pytest.warns(InputWarning, match=r"\['a', 'a', ''\] are duplicated or empty"):
        image = read_image(tmp_path / "dup.ome.tif")
    assert image.channel_names == ("ch0", "ch1", "ch2")


def test_long_name_lists_are_cut_in_messages():
    from unmix.io.images import names_text

    assert names_text([f"ch{i}" for i in range(384)]) == (
        "['ch0', 'ch1', 'ch2', 'ch3', 'ch4', 'ch5', 'ch6', 'ch7' and 376 more]")


def test_zarr_store_with_every_chunk_missing_is_refused(tmp_path, stack):
    import shutil

    write_ome_zarr(tmp_path / "s.ome.zarr", Image(np.moveaxis(stack, 1, 0), "CZYX", ("a", "b", "c")))
    for chunks in [p for p in (tmp_path / "s.ome.zarr").rglob("c") if p.is_dir()]:
        shutil.rmtree(chunks)
    for lazy in (False, True):
        with pytest.raises(InputError, match="every chunk is missing"):
            read_images(tmp_path / "s.ome.zarr", lazy=lazy)


def test_ome_zarr_writer_emits_no_deprecation_warning(tmp_path, stack):
    import subprocess
    import sys

    code = ("import numpy as np, warnings; warnings.simplefilter('default');"
            "from unmix.io.images import Image, write_ome_zarr;"
            f"write_ome_zarr({str(tmp_path / 'w.ome.zarr')!r}, Image(np.zeros((3, 8, 8), np.uint16), 'CYX', "
            "('a', 'b', 'c')))")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert done.returncode == 0 and done.stderr == "", done.stderr


def test_boolean_masks_are_read_as_masks_only(tmp_path):
    # A boolean mask (as scikit-image and numpy write them) is a valid mask, not a valid image.
    mask = np.zeros((24, 32), bool)
    mask[4:10, 5:20] = True
    tifffile.imwrite(tmp_path / "mask.tif", mask)
    np.testing.assert_array_equal(read_image(tmp_path / "mask.tif", mask=True).data[0], mask)
    with pytest.raises(InputError, match="bool"):
        read_image(tmp_path / "mask.tif")


def test_an_image_larger_than_the_memory_is_called_so_before_reading(tmp_path, stack, monkeypatch):
    # Not "damaged": a valid file this machine cannot hold (simulated with 1 KiB available).
    import unmix.io.images as images

    tifffile.imwrite(tmp_path / "big.ome.tif", stack, ome=True, metadata={"axes": "ZCYX"})
    write_ome_zarr(tmp_path / "big.ome.zarr", Image(np.moveaxis(stack, 1, 0), "CZYX", ("a", "b", "c")))
    monkeypatch.setattr(images, "available_memory", lambda: 1024)
    for name in ("big.ome.tif", "big.ome.zarr"):
        with pytest.raises(InputError, match="more than the 0.0 GiB of memory available") as info:
            read_images(tmp_path / name)
        assert "damaged" not in str(info.value)
        read_images(tmp_path / name, lazy=True)  # read block by block: no limit


# --- acquisition settings from OME metadata ---------------------------------------------------------

def _with_settings(path, exposure=(0.1, 0.2), pinhole=(50.0, 60.0), names=("a", "b"), unit="s"):
    """Settings written by tifffile's OME writer (reference writer): exposure per plane, channel attributes."""
    tifffile.imwrite(path, np.zeros((2, 8, 8), np.uint16), ome=True, metadata={
        "axes": "CYX", "Channel": {"Name": list(names), "PinholeSize": list(pinhole),
                                   "ExcitationWavelength": [488.0, 561.0], "EmissionWavelength": [525.0, 600.0]},
        "Plane": {"ExposureTime": list(exposure), "ExposureTimeUnit": [unit, unit]}})
    return path


def test_settings_written_by_tifffiles_ome_writer_are_read_back(tmp_path):
    from unmix.io.acquisition import read_settings

    settings = read_settings(_with_settings(tmp_path / "s.ome.tif", exposure=(100.0, 250.0), unit="ms"))
    assert settings["channels"]["a"] == {"exposure_s": pytest.approx(0.1), "pinhole_um": 50.0,
                                         "excitation_nm": 488.0, "emission_nm": 525.0}
    assert settings["channels"]["b"]["exposure_s"] == pytest.approx(0.25)
    assert settings["image"]["pixel_type"] == "uint16"


def test_detector_and_light_source_settings_are_read(tmp_path):
    # OME schema 2016-06: DetectorSettings and LightSourceSettings of a Channel refer to the Instrument's
    # Detector and Laser by ID (element and attribute names from the OME data model).
    from unmix.io.acquisition import read_settings

    path = _with_settings(tmp_path / "d.ome.tif")
    with tifffile.TiffFile(path) as tif:
        xml = tif.ome_metadata
    instrument = ('<Instrument ID="Instrument:0"><Detector ID="Detector:0" Type="PMT"/>'
                  '<Laser ID="LightSource:0" Power="20" PowerUnit="mW" Wavelength="488"/></Instrument>')
    xml = xml.replace('<Image ID="Image:0"', instrument + '<Image ID="Image:0"', 1)
    xml = xml.replace('<Pixels ID="Pixels:0"', '<Pixels ID="Pixels:0" SignificantBits="12"', 1)
    xml = xml.replace('PinholeSize="50.0"><LightPath/>',
                      'PinholeSize="50.0"><LightSourceSettings ID="LightSource:0" Attenuation="0.05"/>'
                      '<DetectorSettings ID="Detector:0" Gain="1.5" Voltage="650" Offset="-2" Binning="1x1"/>'
                      '<LightPath/>', 1)
    tifffile.tiffcomment(path, xml.encode())
    channel = read_settings(path)["channels"]["a"]
    assert channel["detector_voltage_V"] == 650 and channel["detector_gain"] == 1.5
    assert channel["detector_offset"] == -2 and channel["binning"] == "1x1" and channel["detector_type"] == "PMT"
    assert channel["light_power_mW"] == 20 and channel["light_attenuation"] == 0.05
    assert read_settings(path)["image"]["bit_depth"] == 12


def test_settings_differences_are_warned_or_refused(tmp_path):
    from unmix.errors import InputWarning
    from unmix.io.acquisition import check_settings, read_settings

    reference = read_settings(_with_settings(tmp_path / "control.ome.tif"))
    same = _with_settings(tmp_path / "same.ome.tif")
    slower = _with_settings(tmp_path / "slower.ome.tif", exposure=(0.1, 0.4))
    with pytest.warns(InputWarning, match=r"slower.ome.tif: .*channel b exposure_s is 0.4 in slower.ome.tif but "
                                          r"0.2 in m.json"):
        lines = check_settings(reference, [same, slower], reference_name="m.json")
    assert len(lines) == 1
    with pytest.raises(InputError, match=r"slower.ome.tif: .*exposure_s.*--strict-settings"):
        check_settings(reference, [slower], strict=True, reference_name="m.json")
    bare = tmp_path / "bare.tif"
    tifffile.imwrite(bare, np.zeros((2, 8, 8), np.uint16))
    with pytest.warns(InputWarning, match="no acquisition settings in the OME metadata of bare.tif"):
        check_settings(reference, [bare, bare], reference_name="m.json")


def test_settings_of_ome_zarr_come_from_its_ome_xml(tmp_path):
    # A converted OME-Zarr may keep the OME-XML beside its arrays as OME/METADATA.ome.xml (its layout).
    from unmix.io.acquisition import read_settings

    source = _with_settings(tmp_path / "s.ome.tif")
    folder = write_ome_zarr(tmp_path / "s.ome.zarr", Image(np.zeros((2, 8, 8), np.uint16), "CYX", ("a", "b")))
    (folder / "OME").mkdir()
    with tifffile.TiffFile(source) as tif:
        (folder / "OME" / "METADATA.ome.xml").write_text(tif.ome_metadata)
    assert read_settings(folder)["channels"]["b"]["pinhole_um"] == 60.0
