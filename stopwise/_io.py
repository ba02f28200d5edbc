"""Safe output files.

Every file is written to a temporary sibling and renamed into place, so a failure never
leaves a partial file, and input files are never touched. Before anything is computed the
command line checks each output path with ``check_output_path`` (one rule for every
command):

* ``-`` means standard output and is not checked;
* symbolic links are written through deliberately: the link's target is what gets
  replaced (the link itself stays a link), and every rule below applies to that target;
* an existing target must be a regular file (a folder, device node, FIFO or socket is
  refused, so ``--json /dev/null`` never replaces a device);
* the output must not be one of the inputs (same file by ``os.path.samefile``, which also
  catches hard links and symbolic links);
* the folder that will hold it (or its nearest existing ancestor, where the file's folders
  are created at write time) must accept a new file: a probe file is created and removed
  there, which also catches read-only mounts that ``os.access`` misses.

A new file gets the permissions ``0o666`` less the process umask (as ``open()`` would); a
file that is replaced keeps its permission bits. A write that fails (full disk, file-size
limit) removes its temporary file and raises ``OutputWriteError`` naming the file.
"""

from __future__ import annotations

import os
import stat
import sys
import tempfile
from collections.abc import Iterable
from pathlib import Path
from typing import Any

import pandas as pd

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.data_schemas.json_text import dumps_json

NEW_FILE_MODE = 0o666
KINDS = {
    stat.S_ISDIR: "a folder",
    stat.S_ISCHR: "a character device",
    stat.S_ISBLK: "a block device",
    stat.S_ISFIFO: "a named pipe (FIFO)",
    stat.S_ISSOCK: "a socket",
}


class OutputWriteError(OSError):
    """Writing an output file failed after its checks passed (full disk, size limit, ...);
    the message names the file. The command line exits with code 1."""


def resolved_output(path: str | os.PathLike[str]) -> Path:
    """The file a write to ``path`` replaces: symbolic links followed to their target
    (also a dangling link's), relative paths made absolute."""
    return Path(os.path.realpath(os.fspath(path)))


def file_kind(mode: int) -> str | None:
    """'a folder', 'a character device', ... for a non-regular file's st_mode; None for a
    regular file."""
    if stat.S_ISREG(mode):
        return None
    return next((kind for test, kind in KINDS.items() if test(mode)), "not a regular file")


def refuse_non_regular(path: str | os.PathLike[str], target: Path, option: str) -> None:
    """An existing ``target`` must be a regular file."""
    try:
        kind = file_kind(os.stat(target).st_mode)
    except (FileNotFoundError, NotADirectoryError):
        return
    if kind is not None:
        shown = f"{path} (-> {target})" if str(target) != os.path.abspath(path) else str(path)
        raise StopwiseInputError(
            f"{option} {shown}: the output is {kind}; expected a regular file to write "
            "(nothing was written)"
        )


def is_same_file(a: str | os.PathLike[str], b: str | os.PathLike[str]) -> bool:
    """True when ``a`` and ``b`` are one file (same device and inode, or the same resolved
    path when one does not exist yet)."""
    try:
        return os.path.samefile(a, b)
    except OSError:
        return resolved_output(a) == resolved_output(b)


def nearest_existing_folder(target: Path) -> Path:
    """The closest ancestor of ``target`` that exists (where its folders would be made)."""
    folder = target.parent
    while not folder.exists() and folder != folder.parent:
        folder = folder.parent
    return folder


def probe_writable(folder: Path, path: str | os.PathLike[str], option: str) -> None:
    """Create and remove a probe file in ``folder``; refuse ``path`` if that fails."""
    if not folder.is_dir():
        raise StopwiseInputError(
            f"{option} {path}: {folder} is not a folder, so the output cannot be written there"
        )
    try:
        fd, probe = tempfile.mkstemp(prefix=".stopwise-probe.", dir=folder)
    except OSError as exc:
        raise StopwiseInputError(
            f"{option} {path}: the folder {folder} does not accept new files "
            f"({exc.strerror}); choose another output path (nothing was computed)"
        ) from None
    os.close(fd)
    os.unlink(probe)


def check_output_path(
    path: str | os.PathLike[str],
    inputs: Iterable[str | os.PathLike[str]] = (),
    option: str = "output",
) -> Path | None:
    """Check one output path before anything is computed (module docstring); returns the
    resolved target, or None for standard output ('-'). ``option`` names the path in
    messages (e.g. '--json')."""
    if os.fspath(path) == "-":
        return None
    target = resolved_output(path)
    refuse_non_regular(path, target, option)
    for source in inputs:
        if is_same_file(target, source):
            raise StopwiseInputError(
                f"{option} {path}: this is the input file {source}; writing there would "
                "replace the data (choose another output path)"
            )
    probe_writable(nearest_existing_folder(target), path, option)
    return target


def check_output_folder(path: str | os.PathLike[str], option: str = "output folder") -> Path:
    """An output folder: a folder if it exists, and creatable/writable where it will be."""
    folder = resolved_output(path)
    if folder.exists() and not folder.is_dir():
        raise StopwiseInputError(f"{option} {path}: exists and is not a folder")
    probe_writable(folder if folder.exists() else nearest_existing_folder(folder), path, option)
    return folder


def current_umask() -> int:
    """The process umask, read from /proc where possible (no change of process state),
    else by setting and restoring it."""
    try:
        with open("/proc/self/status", encoding="ascii") as status:
            for line in status:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def output_mode(target: Path) -> int:
    """Permission bits for ``target``: an existing file's own, else 0o666 & ~umask."""
    try:
        return stat.S_IMODE(os.stat(target).st_mode)
    except (FileNotFoundError, NotADirectoryError):
        return NEW_FILE_MODE & ~current_umask()


_PENDING: set[str] = set()  # temporary files being written (removed on SIGTERM)


def remove_pending_temporaries() -> None:
    """Delete the temporary files of writes in progress (the command line's SIGTERM
    handler calls this before it exits, so no hidden file is left behind)."""
    for name in list(_PENDING):
        try:
            os.unlink(name)
        except OSError:
            pass
        _PENDING.discard(name)


def _open_temporary(target: Path) -> tuple[int, str]:
    """Create ``.<name>.<random>.tmp`` beside ``target`` (mode 0600, exclusive). The name
    is registered in _PENDING *before* the file exists, so a signal handler running at
    any moment finds every temporary file."""
    for _ in range(100):
        name = os.path.join(target.parent, f".{target.name}.{os.urandom(6).hex()}.tmp")
        _PENDING.add(name)
        try:
            return os.open(name, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600), name
        except FileExistsError:
            _PENDING.discard(name)
    raise FileExistsError(f"no free temporary name beside {target}")


def write_atomic(path: str | os.PathLike[str], data: str | bytes) -> Path:
    """Write ``data`` to ``path`` atomically (temporary sibling, then rename), following a
    symbolic link to its target; returns the path given."""
    target = resolved_output(path)
    refuse_non_regular(path, target, "output")
    mode = "wb" if isinstance(data, bytes) else "w"
    tmp: str | None = None
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        permissions = output_mode(target)
        fd, tmp = _open_temporary(target)
        with os.fdopen(fd, mode, **({} if mode == "wb" else {"encoding": "utf-8"})) as fh:
            os.fchmod(fh.fileno(), permissions)
            fh.write(data)
        os.replace(tmp, target)
    except OSError as exc:
        raise OutputWriteError(
            exc.errno, f"cannot write {os.fspath(path)}: {exc.strerror or exc}"
        ) from exc
    finally:
        if tmp is not None:
            Path(tmp).unlink(missing_ok=True)
            _PENDING.discard(tmp)
    return Path(path)


def write_json(path: str | os.PathLike[str], obj: Any) -> None:
    """Write ``obj`` as JSON to ``path`` atomically, or to stdout when path is ``-``."""
    text = dumps_json(obj)
    if str(path) == "-":
        sys.stdout.write(text)
        sys.stdout.flush()
    else:
        write_atomic(path, text)


def write_table(path: str | os.PathLike[str], frame: pd.DataFrame) -> Path:
    """Write a DataFrame atomically as CSV or Parquet (by the file ending)."""
    target = Path(path)
    if target.suffix.lower() in (".parquet", ".pq"):
        import io

        buffer = io.BytesIO()
        frame.to_parquet(buffer, index=False)
        return write_atomic(target, buffer.getvalue())
    return write_atomic(target, frame.to_csv(index=False))
