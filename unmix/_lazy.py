"""Lazy package exports: a name is imported from its module on first use.

The command line must start fast and pay only for the libraries a subcommand
uses (numba, dask, zarr and matplotlib take seconds to import), so no
package ``__init__`` imports its modules eagerly.
"""

from importlib import import_module


def lazy_exports(package: str, exports: dict[str, str]):
    """Return ``(__getattr__, __dir__, __all__)`` for `package` exporting ``{name: relative module}``."""

    def __getattr__(name):
        if name in exports:
            module = import_module(f".{exports[name]}", package)
            value = getattr(module, name)
            setattr(import_module(package), name, value)
            return value
        raise AttributeError(f"module {package!r} has no attribute {name!r}")

    def __dir__():
        return sorted(exports)

    return __getattr__, __dir__, sorted(exports)
