"""Reading and writing: images, atomic outputs, provenance, the shipped data.

In: file paths (TIFF, OME-TIFF, OME-Zarr). Out: :class:`Image` objects with
canonical axes and channel names, and files written under a temporary name and
renamed into place. Imports nothing of ours but the error types.
"""

from .._lazy import lazy_exports

__getattr__, __dir__, __all__ = lazy_exports(__name__, {
    "Image": "images",
    "read_image": "images",
    "read_images": "images",
    "open_images": "images",
    "read_block": "images",
    "write_ome_tiff": "images",
    "write_ome_zarr": "images",
    "read_provenance": "images",
    "atomic_output": "atomic",
    "write_text_atomic": "atomic",
    "safe_file_name": "atomic",
    "sha256_path": "provenance",
    "utc_now": "provenance",
    "shipped_dir": "shipped",
})
