"""The link-swap race used by the destruction tests (destroy, withdrawal, intake).

A thread keeps swapping named entries of a folder: a real entry is moved aside
and replaced by a symbolic link to something outside; a link is replaced by a
fresh real entry again.  The code under test runs meanwhile, and the test then
checks that the outside is unchanged byte for byte.  One implementation here,
each race its own small test in its own file.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path

Maker = Callable[[Path], None]


def real_file(data: bytes) -> Maker:
    """Make a real file holding ``data`` at the given path."""
    def make(p: Path) -> None:
        p.write_bytes(data)
    return make


def real_dir(files: Mapping[str, bytes]) -> Maker:
    """Make a real subfolder holding ``files`` (name -> bytes) at the given path."""
    def make(p: Path) -> None:
        os.mkdir(p)
        for name, data in files.items():
            (p / name).write_bytes(data)
    return make


class LinkSwaps:
    """A thread swapping entries of ``folder`` for links until ``count`` swaps are done.

    Parameters
    ----------
    folder : Path
        The folder whose entries are swapped (an inbox, a tree being destroyed).
    aside : Path
        Where real entries are moved when a link takes their place (outside ``folder``).
    entries : sequence of (name, link_target, maker)
        Per entry name: what the link points to, and how to make a real entry again.
    count : int
        Swaps to do before the thread ends.

    Use as a context manager: the thread starts on entry; on exit it is told to
    stop and joined.  ``running`` is true while the swaps go on; ``swaps``
    counts the swaps done.
    """

    def __init__(self, folder: Path, aside: Path, entries: Sequence[tuple[str, Path, Maker]],
                 count: int = 10_000):
        if count < 1:
            raise ValueError(f"count must be a positive number of swaps, got {count!r}")
        self.folder, self.aside, self.entries, self.count = Path(folder), Path(aside), list(entries), count
        self.swaps = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="link-swaps")

    @property
    def running(self) -> bool:
        return self._thread.is_alive()

    def _run(self) -> None:
        i = 0
        while self.swaps < self.count and not self._stop.is_set():
            i += 1
            for name, target, make in self.entries:
                p = self.folder / name
                try:
                    if os.path.islink(p) or not os.path.lexists(p):
                        if os.path.islink(p):
                            os.unlink(p)
                        make(p)
                    else:
                        os.rename(p, self.aside / f"aside{i}-{name}")
                        os.symlink(target, p)
                    self.swaps += 1
                except OSError:
                    pass  # the code under test removed or moved the entry first: the race itself

    def __enter__(self) -> LinkSwaps:
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._thread.join()


def snapshot(folder: Path) -> dict[str, bytes]:
    """Every file under ``folder`` (relative path -> bytes), to compare before and after."""
    folder = Path(folder)
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}
