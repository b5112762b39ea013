"""Writing files safely: to a temporary file in the same folder, then renamed into place.

An existing output is never replaced unless the caller passes ``force=True``,
and a failure part-way leaves no half-written file behind.
"""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path
from typing import Callable

from lapsewise.errors import InputError


def check_writable(path: str | Path, force: bool) -> Path:
    """Refuse to overwrite an existing output without ``force``; refuse a folder or a missing parent."""
    path = Path(path)
    if path.is_dir():
        raise InputError(f"{path}: is a folder; give a file name for the output")
    if path.exists() and not force:
        raise InputError(f"{path}: already exists; pass --force to overwrite it or choose another name")
    if not path.parent.exists():
        raise InputError(f"{path}: the folder {path.parent} does not exist; create it first")
    return path


def write_atomic(path: str | Path, write: Callable[[Path], None], force: bool = False) -> Path:
    """Call ``write(temporary_path)`` and rename the result onto ``path``."""
    path = check_writable(path, force)
    handle, temporary = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(handle)
    temporary_path = Path(temporary)
    try:
        write(temporary_path)
        os.replace(temporary_path, path)
    finally:
        if temporary_path.exists():
            temporary_path.unlink()
    return path


def write_text_atomic(path: str | Path, text: str, force: bool = False) -> Path:
    return write_atomic(path, lambda p: p.write_text(text, encoding="utf-8"), force)


def dumps_stable(data: object) -> str:
    """JSON with sorted keys and a trailing newline: the same input always gives the same bytes."""
    return json.dumps(data, indent=2, sort_keys=True, allow_nan=False) + "\n"
