"""Files that appear whole or not at all: write to a temporary name, then rename."""

from __future__ import annotations

import os
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path


@contextmanager
def atomic_path(path: str | os.PathLike, *, shared: bool = True) -> Iterator[Path]:
    """Yield a temporary file beside ``path``; on success it replaces ``path``.

    On any failure the temporary file is removed and an existing ``path`` is left untouched.
    ``shared`` gives the result mode 0644 (mkstemp creates 0600; outputs are meant to be read
    by others).
    """
    path = Path(path)
    fd, name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    tmp = Path(name)
    try:
        yield tmp
        if shared:
            os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
