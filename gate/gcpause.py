"""The cyclic garbage collector paused while roofgate builds or reads large structures.

Analysis, judging and report writing allocate millions of small objects that live
until the run ends and form no reference cycles worth collecting early (records,
profiles, costs, JSON pieces). Each collection of the oldest generation walks all of
them again: 14% of a 100k-node ``profile`` and about a sixth of a large ``check``.
Pausing only delays collection (anything cyclic is collected once it resumes), and
the previous state is always restored.
"""

from __future__ import annotations

import gc
from collections.abc import Iterator
from contextlib import contextmanager


@contextmanager
def cyclic_gc_paused() -> Iterator[None]:
    """Pause the cyclic garbage collector for the ``with`` block (nests; restores)."""
    enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if enabled:
            gc.enable()
