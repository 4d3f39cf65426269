"""The one owner of output files: '-' is stdout, folders are created, writes are atomic.

A report, snapshot or shard file is written to a hidden partial file next to
its target and moved into place only when complete, so a crash never leaves a
half-written file that a later step could read as a result.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import TextIO

from gate.errors import InputError


@contextmanager
def open_output(path: str, what: str) -> Iterator[TextIO]:
    """A text stream for ``path`` ('-' = stdout); ``what`` names the file in errors."""
    if path == "-":
        yield sys.stdout
        return
    target = Path(path)
    partial = target.with_name(f".{target.name}.partial")
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        with open(partial, "w", encoding="utf-8", newline="\n") as stream:
            yield stream
        os.replace(partial, target)
    except OSError as exc:
        raise InputError(f"cannot write the {what} ({exc.strerror})", path) from None
    finally:
        if partial.exists():
            partial.unlink()
