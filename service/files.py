"""Result files on disk: written whole or not at all, as the umask allows. Light: the client imports it."""

from __future__ import annotations

import os
import secrets
from pathlib import Path


def write_atomically(path: Path, data: bytes) -> None:
    """Write ``data`` to a temporary file beside ``path`` and rename it, so no partial file is ever seen.

    The file is created with mode 0666 less the process umask, like any file the user makes (mkstemp's
    0600 would hide results from colleagues on a group server).
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    while True:
        tmp = path.parent / f".{path.name}.{secrets.token_hex(6)}.part"
        try:
            # O_EXCL: never write through a name someone else made; the kernel applies the umask to 0o666.
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
        except FileExistsError:
            continue
        break
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
