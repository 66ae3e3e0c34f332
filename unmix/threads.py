"""Running GIL-releasing compiled kernels on several threads."""

from __future__ import annotations

import os

THREADS = max(1, min(8, os.cpu_count() or 1))


def map_in_threads(kernel, argument_lists):
    """Call `kernel(*arguments)` for each argument list, in threads; results in order."""
    if len(argument_lists) == 1 or THREADS == 1:
        return [kernel(*arguments) for arguments in argument_lists]
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=min(THREADS, len(argument_lists))) as pool:
        return list(pool.map(lambda arguments: kernel(*arguments), argument_lists))
