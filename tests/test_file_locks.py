"""The folder locks are portalocker's, on every platform: no module of collector imports
``fcntl`` (Unix only), and the gather lock and the hash-file lock still refuse a second holder
when the only lock available is the library's (``fcntl`` hidden from everything imported
after portalocker, in a child process)."""

from __future__ import annotations

import ast
import subprocess
import sys
import textwrap
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def test_no_module_imports_fcntl() -> None:
    """fcntl exists only on Unix; locking goes through collector.storage.file_locks."""
    offenders = []
    for path in sorted((REPO / "collector").rglob("*.py")):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            names = ([a.name for a in node.names] if isinstance(node, ast.Import)
                     else [node.module or ""] if isinstance(node, ast.ImportFrom) else [])
            if any(n.split(".")[0] == "fcntl" for n in names):
                offenders.append(str(path.relative_to(REPO)))
    assert offenders == []


CHILD = textwrap.dedent("""
    import sys, tempfile
    from pathlib import Path
    import portalocker  # the library takes fcntl (POSIX) or msvcrt/pywin32 (Windows) itself
    sys.modules["fcntl"] = None  # from here on, `import fcntl` fails for anyone else
    from collector.errors import CollectionError
    from collector.storage import hashindex
    from collector.storage.collection import init_collection
    from collector.storage.file_locks import LockHeldElsewhere, lock_exclusive

    root = Path(tempfile.mkdtemp())
    col = init_collection(root / "col", contact="x@example.org")
    with col.gather_lock():
        try:
            with col.gather_lock():
                print("second holder got the gather lock")
        except CollectionError as exc:
            print("refused:", exc)
    with col.gather_lock():
        print("taken again after release")
    lock_path = root / "h.lock"
    lock_path.touch()
    with open(lock_path, "r+b") as first, open(lock_path, "r+b") as second:
        lock_exclusive(first, wait=False)
        try:
            lock_exclusive(second, wait=False)
            print("second handle got the lock")
        except LockHeldElsewhere:
            print("second handle refused")
    with hashindex._locked(root / "cache" / "hashes.bin"):
        print("hash lock taken")
""")


def test_locks_work_on_the_library_alone(tmp_path: Path) -> None:
    """With fcntl unavailable to collector, the gather lock refuses a second holder (the
    wording names the holder's process), is free again after release, and the hash-file
    lock works."""
    done = subprocess.run([sys.executable, "-c", CHILD], capture_output=True, text=True,
                          timeout=120, cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    lines = done.stdout.splitlines()
    assert lines[0].startswith("refused: another gather is already running on ")
    assert "(process " in lines[0]
    assert lines[1:] == ["taken again after release", "second handle refused", "hash lock taken"]
