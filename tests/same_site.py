"""Refactoring check: the demo site built from a git commit and from the working tree are the same.

    python tests/same_site.py [COMMIT]      (default: HEAD)

Builds the demo cycle twice, from a clean checkout of COMMIT (a git worktree in a temporary folder)
and from this source tree, each in its own process, then compares every file of the two sites
byte for byte. Only the build time and the config file's hash (the config holds the output path,
which differs) may differ; the script prints any other difference and exits 1. Takes about three
minutes on a 2-core machine.
"""

from __future__ import annotations

import filecmp
import re
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
# Lines allowed to differ: the build time, and the config hash (the config holds its own paths).
ALLOWED = re.compile(rb"\d{4}-\d\d-\d\d \d\d:\d\d UTC|[0-9a-f]{64}")


def build(source: Path, out: Path) -> Path:
    """Run ``fairgauge demo`` from the source tree ``source`` into ``out``; the site's folder."""
    code = (
        "import sys; sys.path.insert(0, sys.argv[1]); from pipeline.cli import main; "
        "main(['demo', '--folder', sys.argv[2], '--site', sys.argv[3]])"
    )
    site = out / "site"
    subprocess.run(
        [sys.executable, "-c", code, str(source), str(out / "cycle"), str(site)],
        check=True,
        cwd=source,
    )
    return site


def differences(first: Path, second: Path) -> list[str]:
    """Files present in only one site, or whose bytes differ beyond the allowed fields."""
    out = []
    names = {p.relative_to(first) for p in first.rglob("*") if p.is_file()}
    others = {p.relative_to(second) for p in second.rglob("*") if p.is_file()}
    out += [f"only in {first}: {n}" for n in sorted(names - others)]
    out += [f"only in {second}: {n}" for n in sorted(others - names)]
    for name in sorted(names & others):
        a, b = first / name, second / name
        if filecmp.cmp(a, b, shallow=False):
            continue
        if ALLOWED.sub(b"", a.read_bytes()) != ALLOWED.sub(b"", b.read_bytes()):
            out.append(f"differs: {name}")
    return out


def main(commit: str = "HEAD") -> int:
    with tempfile.TemporaryDirectory() as tmp:
        old = Path(tmp) / "old-source"
        subprocess.run(
            ["git", "worktree", "add", "--detach", str(old), commit], cwd=ROOT, check=True
        )
        try:
            first = build(old, Path(tmp) / "old")
            second = build(ROOT, Path(tmp) / "new")
        finally:
            subprocess.run(["git", "worktree", "remove", "--force", str(old)], cwd=ROOT, check=True)
        found = differences(first, second)
        files = sum(1 for p in first.rglob("*") if p.is_file())
    print("\n".join(found) or f"same site: {files} files, {commit} and the working tree")
    return 1 if found else 0


if __name__ == "__main__":
    sys.exit(main(*sys.argv[1:]))
