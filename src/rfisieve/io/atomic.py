"""Outputs written safely: a temporary name in the destination directory, renamed when
complete (:func:`atomic_output`), so an interrupted run never leaves a file that looks
finished; the leftovers of a killed run found by their names (:func:`remove_partials`).

Kept apart from :mod:`rfisieve.io.scan` (which re-exports these names) so that
``rfisieve run`` can clear leftovers before it starts Snakemake without importing h5py.
"""

import contextlib
import os
import tempfile
from pathlib import Path

#: Temporary names of :func:`atomic_output` (hidden, in the destination directory):
#: ``.<name>.partial.<random>[<suffix>]``, and ``.<name>.<random>.partial`` of older versions.
PARTIAL_GLOBS = (".*.partial.*", ".*.partial")


def remove_partials(directory):
    """Remove the temporary files that :func:`atomic_output` left under ``directory``.

    Only files whose name matches :data:`PARTIAL_GLOBS` are removed: those of runs that
    were killed (SIGKILL, power loss) before they could clean up.  Call it only while no
    other process writes under ``directory`` (``rfisieve run`` holds the outdir lock).
    Returns the paths removed.
    """
    removed = []
    found = {p for pattern in PARTIAL_GLOBS for p in Path(directory).rglob(pattern)} if Path(directory).is_dir() else ()
    for path in sorted(found):
        if path.is_file() and not path.is_symlink():
            with contextlib.suppress(FileNotFoundError):
                path.unlink()
                removed.append(path)
    return removed


def _umask():
    mask = os.umask(0)
    os.umask(mask)
    return mask


@contextlib.contextmanager
def atomic_output(path, suffix=None):
    """Yield a temporary path beside ``path``; rename it to ``path`` when the block ends.

    On an exception the temporary file is removed and nothing is left at ``path``.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.partial.", suffix=suffix or "", dir=path.parent)
    os.close(fd)
    tmp = Path(tmp)
    try:
        yield tmp
        os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes 0600; outputs are for everyone
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()
        raise
