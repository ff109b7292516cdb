"""Small file helpers with no heavy imports: hashing and atomic writes.

Every output specflow writes goes through :func:`write_atomic_bytes` (a temporary file in the
same folder, flushed to disk, then renamed), so a reader sees the old content or the whole new
content, never half of it.
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path


def sha256_and_size(path: Path, chunk: int = 1 << 20) -> tuple[str, int]:
    """SHA-256 (hex) and size in bytes of a file, read in chunks."""
    h = hashlib.sha256()
    size = 0
    with open(path, "rb") as f:
        while True:
            b = f.read(chunk)
            if not b:
                break
            h.update(b)
            size += len(b)
    return h.hexdigest(), size


def sha256_file(path: Path) -> str:
    return sha256_and_size(path)[0]


def write_atomic_bytes(path: Path, data: bytes) -> None:
    """Write a file so that readers see the old content or the whole new content, never half."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    with open(tmp, "wb") as f:
        f.write(data)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


def write_atomic_text(path: Path, text: str) -> None:
    write_atomic_bytes(path, text.encode("utf-8"))
