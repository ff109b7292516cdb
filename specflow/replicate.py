"""What the replication commands share: the checksum manifest, the environment record, safe paths.

``specflow package`` (:mod:`specflow.package`) writes a folder whose every file is listed in
``MANIFEST.sha256``; ``specflow verify`` (:mod:`specflow.verify`) checks that manifest, reruns
the study in a scratch copy and compares the numbers; ``specflow diff``
(:mod:`specflow.revisions`) compares the estimates of two runs. This module holds the parts
that more than one of them needs and imports nothing heavy.

The manifest format
-------------------
One entry per file, sorted by path, in the format GNU ``sha256sum`` reads (so that a data
editor can check a deposit without specflow: ``sha256sum -c MANIFEST.sha256``); each entry is
preceded by a comment line with the file's size in bytes, which ``sha256sum`` ignores::

    # size 214139
    9264ddf8...  specs/data/farms.csv

Data files that the package does not include (``redistribute = false``) are listed in a
comment section at the end, ``# not included: <sha256> <size> <path>``, so that a replicator
who obtains them can check they hold the same bytes as the authors' copy.
"""

from __future__ import annotations

import os
import platform
import re
import sys
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath

from .files import sha256_and_size  # noqa: F401 - part of this module's interface
from .errors import SpecflowError

MANIFEST_NAME = "MANIFEST.sha256"
INFO_NAME = "replication.json"
SOFTWARE_DIR = "software"

# The runtime buckets of the data editors' template README, with their upper bounds in seconds.
RUNTIME_BUCKETS: tuple[tuple[str, float], ...] = (
    ("< 10 minutes", 600),
    ("10-60 minutes", 3600),
    ("1-2 hours", 2 * 3600),
    ("2-8 hours", 8 * 3600),
    ("8-24 hours", 24 * 3600),
    ("1-3 days", 3 * 86400),
    ("3-14 days", 14 * 86400),
    ("> 14 days", float("inf")),
)


class ReplicationError(SpecflowError):
    """A package cannot be built, read or verified (one line; exit code 2)."""


def runtime_bucket(seconds: float) -> str:
    """The template's runtime bucket holding ``seconds`` (a bucket's upper bound is exclusive)."""
    for label, upper in RUNTIME_BUCKETS:
        if seconds < upper:
            return label
    return RUNTIME_BUCKETS[-1][0]


# ---------------------------------------------------------------------------------------------
# Files and the manifest




def safe_relpath(name: str) -> PurePosixPath:
    """A relative path that stays inside the folder it is joined to, or ReplicationError.

    Refuses absolute paths, Windows drive letters and UNC names, backslashes, empty names and
    any ``..`` component (even one that would come back inside).
    """
    if not name or "\x00" in name:
        raise ReplicationError(f"refused path {name!r}: empty or contains a NUL byte")
    if "\\" in name:
        raise ReplicationError(f"refused path {name!r}: contains a backslash")
    if name.startswith("/") or re.match(r"^[A-Za-z]:", name):
        raise ReplicationError(f"refused path {name!r}: absolute paths are not allowed")
    p = PurePosixPath(name)
    if any(part == ".." for part in p.parts):
        raise ReplicationError(f"refused path {name!r}: '..' would leave the folder")
    parts = [x for x in p.parts if x not in ("", ".")]
    if not parts:
        raise ReplicationError(f"refused path {name!r}: names no file")
    return PurePosixPath(*parts)


def list_files(root: Path, skip: set[str] | None = None) -> tuple[list[str], list[str]]:
    """Every file under ``root`` as sorted POSIX relative paths, and the paths that are not
    regular files (symlinks, sockets, devices), which a package must not contain."""
    skip = skip or set()
    files: list[str] = []
    odd: list[str] = []
    for dirpath, dirnames, filenames in os.walk(root, followlinks=False):
        d = Path(dirpath)
        for name in list(dirnames):
            if (d / name).is_symlink():
                odd.append((d / name).relative_to(root).as_posix())
                dirnames.remove(name)
        for name in filenames:
            p = d / name
            rel = p.relative_to(root).as_posix()
            if rel in skip:
                continue
            if p.is_symlink() or not p.is_file():
                odd.append(rel)
            else:
                files.append(rel)
    return sorted(files), sorted(odd)


@dataclass
class Manifest:
    """Paths -> (sha256, size) for the files included, and those listed but not included."""

    files: dict[str, tuple[str, int]] = field(default_factory=dict)
    not_included: dict[str, tuple[str, int]] = field(default_factory=dict)

    def text(self) -> str:
        lines = [
            "# specflow replication package: SHA-256 and size in bytes of every file but this one.",
            "# Check it with `specflow verify .` or, without specflow, `sha256sum -c MANIFEST.sha256`.",
        ]
        for path in sorted(self.files):
            digest, size = self.files[path]
            lines.append(f"# size {size}")
            lines.append(f"{digest}  {path}")
        if self.not_included:
            lines.append("#")
            lines.append("# Data files not included (not redistributable; see README.md, 'Data availability'):")
            for path in sorted(self.not_included):
                digest, size = self.not_included[path]
                lines.append(f"# not included: {digest} {size} {path}")
        return "\n".join(lines) + "\n"


_ENTRY = re.compile(r"^([0-9a-f]{64}) [ *](.+)$")
_SIZE = re.compile(r"^# size (\d+)$")
_NOT_INCLUDED = re.compile(r"^# not included: ([0-9a-f]{64}) (\d+) (.+)$")


def build_manifest(root: Path, not_included: dict[str, tuple[str, int]] | None = None) -> Manifest:
    files, odd = list_files(root, skip={MANIFEST_NAME})
    if odd:
        raise ReplicationError(f"{root}: not a regular file (symlink or special file): {odd[0]}")
    return Manifest({rel: sha256_and_size(root / rel) for rel in files}, dict(not_included or {}))


def read_manifest(root: Path) -> Manifest:
    path = root / MANIFEST_NAME
    if not path.is_file() or path.is_symlink():
        raise ReplicationError(f"{root}: no {MANIFEST_NAME}: not a specflow replication package")
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ReplicationError(f"{path}: cannot read the manifest: {exc}") from None
    m = Manifest()
    size: int | None = None
    for i, line in enumerate(text.splitlines(), start=1):
        if not line.strip():
            continue
        s = _SIZE.match(line)
        if s:
            size = int(s.group(1))
            continue
        n = _NOT_INCLUDED.match(line)
        if n:
            rel = str(safe_relpath(n.group(3)))
            m.not_included[rel] = (n.group(1), int(n.group(2)))
            continue
        if line.startswith("#"):
            continue
        e = _ENTRY.match(line)
        if not e or size is None:
            raise ReplicationError(f"{path}:{i}: not a manifest entry (expected a size comment, then '<sha256>  <path>')")
        try:
            rel = str(safe_relpath(e.group(2)))
        except ReplicationError as exc:
            raise ReplicationError(f"{path}:{i}: {exc}") from None
        m.files[rel] = (e.group(1), size)
        size = None
    return m


@dataclass
class ManifestCheck:
    """The result of checking a folder against its manifest."""

    checked: int = 0
    changed: list[tuple[str, str]] = field(default_factory=list)  # (path, what differs)
    missing: list[str] = field(default_factory=list)
    extra: list[str] = field(default_factory=list)
    not_regular: list[str] = field(default_factory=list)
    restricted_present: list[str] = field(default_factory=list)  # obtained, bytes match
    restricted_absent: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not (self.changed or self.missing or self.extra or self.not_regular)

    def lines(self) -> list[str]:
        out = [f"changed: {p} ({why})" for p, why in self.changed]
        out += [f"missing: {p}" for p in self.missing]
        out += [f"extra (not in the manifest): {p}" for p in _group_extra(self.extra)]
        out += [f"not a regular file: {p}" for p in self.not_regular]
        return out


def _group_extra(paths: list[str], limit: int = 20) -> list[str]:
    """List stray files one by one, or by top-level folder when there are many."""
    if len(paths) <= limit:
        return paths
    groups: dict[str, int] = {}
    for p in paths:
        top = p.split("/", 1)[0] + ("/" if "/" in p else "")
        groups[top] = groups.get(top, 0) + 1
    return [f"{top} ({n} files)" if n > 1 else top for top, n in sorted(groups.items())]


def check_manifest(root: Path) -> ManifestCheck:
    """Compare every file under ``root`` with ``MANIFEST.sha256``: changed, missing, extra."""
    m = read_manifest(root)
    files, odd = list_files(root, skip={MANIFEST_NAME})
    res = ManifestCheck(not_regular=odd)
    present = set(files)
    for rel, (digest, size) in sorted(m.files.items()):
        if rel not in present:
            res.missing.append(rel)
            continue
        got_digest, got_size = sha256_and_size(root / rel)
        res.checked += 1
        if got_size != size:
            res.changed.append((rel, f"size {got_size} bytes, manifest says {size}"))
        elif got_digest != digest:
            res.changed.append((rel, "SHA-256 differs from the manifest"))
    for rel in sorted(present - set(m.files)):
        if rel in m.not_included:
            digest, size = m.not_included[rel]
            if sha256_and_size(root / rel) == (digest, size):
                res.restricted_present.append(rel)
            else:
                res.changed.append((rel, "obtained data file differs from the authors' copy (SHA-256 or size)"))
        else:
            res.extra.append(rel)
    res.restricted_absent = sorted(set(m.not_included) - present)
    return res


# ---------------------------------------------------------------------------------------------
# The environment


def _canon(name: str) -> str:
    return re.sub(r"[-_.]+", "-", name).lower()


def dependency_versions(root: str = "specflow") -> dict[str, str]:
    """Exact installed versions of every distribution ``root`` needs, transitively.

    Walks the installed metadata (``importlib.metadata``), follows each requirement whose
    environment marker holds here (extras only where a parent asked for them), and returns
    ``{canonical name: version}`` without ``root`` itself. A requirement that is not
    installed is skipped: it is either optional or not needed on this platform.
    """
    from importlib import metadata

    from packaging.markers import default_environment
    from packaging.requirements import InvalidRequirement, Requirement

    env = default_environment()
    out: dict[str, str] = {}
    done: dict[str, set[str]] = {}
    stack: list[tuple[str, frozenset[str]]] = [(root, frozenset())]
    while stack:
        name, extras = stack.pop()
        key = _canon(name)
        if key in done and extras <= done[key]:
            continue
        try:
            dist = metadata.distribution(name)
        except metadata.PackageNotFoundError:
            continue
        done[key] = done.get(key, set()) | set(extras)
        if key != _canon(root):
            out[_canon(dist.metadata["Name"])] = dist.version
        for text in dist.requires or []:
            try:
                req = Requirement(text)
            except InvalidRequirement:
                continue
            if req.marker is not None:
                wanted = [""] + sorted(extras)
                if not any(req.marker.evaluate({**env, "extra": e}) for e in wanted):
                    continue
            stack.append((req.name, frozenset(req.extras)))
    return dict(sorted(out.items()))


def memory_bytes() -> int | None:
    """Physical memory of this machine, or None where it cannot be read."""
    try:
        with open("/proc/meminfo", encoding="ascii") as f:
            for line in f:
                if line.startswith("MemTotal:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    try:
        return int(os.sysconf("SC_PAGE_SIZE")) * int(os.sysconf("SC_PHYS_PAGES"))
    except (ValueError, OSError, AttributeError):
        return None


def environment() -> dict:
    """The software and hardware this process runs on, for the README and for verify."""
    from . import __version__

    mem = memory_bytes()
    return {
        "python": platform.python_version(),
        "python_implementation": platform.python_implementation(),
        "specflow": __version__,
        "os": f"{platform.system()} {platform.release()}",
        "platform": platform.platform(),
        "machine": platform.machine(),
        "cpu_count": os.cpu_count(),
        "memory_bytes": mem,
        "packages": dependency_versions(),
    }


def human_bytes(n: int | None) -> str:
    if n is None:
        return "unknown"
    x = float(n)
    for unit in ("bytes", "KiB", "MiB", "GiB", "TiB"):
        if x < 1024 or unit == "TiB":
            return f"{int(x)} bytes" if unit == "bytes" else f"{x:.1f} {unit}"
        x /= 1024
    return f"{n} bytes"


def version_differences(recorded: dict, current: dict) -> list[str]:
    """One line per software version that differs between a package's record and this process."""
    out = []
    for key in ("python", "specflow"):
        a, b = recorded.get(key), current.get(key)
        if a and b and a != b:
            out.append(f"{key}: package built with {a}, this environment has {b}")
    rp, cp = recorded.get("packages", {}), current.get("packages", {})
    for name in sorted(set(rp) | set(cp)):
        a, b = rp.get(name), cp.get(name)
        if a == b:
            continue
        if b is None:
            out.append(f"{name}: package built with {a}, not installed here")
        elif a is None:
            out.append(f"{name}: not in the package's environment, {b} installed here")
        else:
            out.append(f"{name}: package built with {a}, this environment has {b}")
    return out


def python_command() -> str:
    """How the README should tell a replicator to call Python 3 of this minor version."""
    return f"python{sys.version_info.major}.{sys.version_info.minor}"
