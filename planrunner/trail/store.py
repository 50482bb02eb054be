"""The one writer of new files and folders (never replaces) and the one reader of JSON files.

Every file planrunner leaves behind is created new: a run folder, a lock, a comparison or
self-check report. Each is written in full beside its target, flushed to disk and only then put in
place, so a name that exists always holds a complete file or folder, and a name that is taken is
never written over. The history log is the one file appended to (`trail.files`), and the index
page beside the run folders (`trail.index`) the one file replaced, by `replace_file`: it is a view
of the log and the records, rewritten after each run, and the new page is written in full beside
it and renamed over it, so that a reader sees the old page or the new one, never a part.

Every JSON file planrunner reads back (a record, a lock, a self-check report) is read by
`read_json`, whose errors say the file, the line and column, what is wrong and what to do.
"""

from __future__ import annotations

import contextlib
import errno
import json
import os
import secrets
import shutil
from collections.abc import Callable, Iterator, Mapping
from pathlib import Path
from typing import Any

from planrunner.errors import OutputError, PlanrunnerError, RecordError
from planrunner.execute.signals import holding_interrupts

STAGING_PREFIX = ".staging-"  # folders being written; a killed run may leave one, never a run folder


# --- writing ---------------------------------------------------------------------------------------

def write_new_file(target: str | Path, text: str | bytes, *, what: str = "file", hint: str = "choose a new file name",
                   taken: str | None = None) -> Path:
    """Create ``target`` holding ``text``; refuse if anything exists under that name.

    ``what`` names the file in messages; ``taken`` replaces the message for a name already taken.

    The text goes to a hidden file beside the target first and is then linked into place: the
    target appears complete or not at all, and the link fails if the name was taken meanwhile.
    """
    target = Path(target)
    staging = target.with_name(f".{target.name}.{secrets.token_hex(4)}.tmp")
    try:
        write_synced(staging, text)
        os.link(staging, target)
    except FileExistsError:
        raise OutputError(taken or f"the {what} exists already; planrunner never overwrites a file",
                          where=str(target), hint=hint) from None
    except OSError as exc:
        raise OutputError(f"cannot write the {what}: {exc.strerror or exc}", where=str(target),
                          hint="choose another place, or free space") from None
    finally:
        staging.unlink(missing_ok=True)
    return target


def replace_file(target: Path, text: str, *, what: str) -> Path:
    """Write ``target`` anew, whether or not it exists: the text goes to a hidden file beside it,
    is flushed to disk, and is renamed over it (atomic on POSIX and Windows). Only the index page is
    written this way (see the module's docstring); every other file is created new."""
    staging = target.with_name(f".{target.name}.{secrets.token_hex(4)}.tmp")
    try:
        write_synced(staging, text)
        os.replace(staging, target)
    except OSError as exc:
        raise OutputError(f"cannot write the {what}: {exc.strerror or exc}", where=str(target),
                          hint="free space or check the folder's permissions; the runs themselves are kept") from None
    finally:
        staging.unlink(missing_ok=True)
    sync_folder(target.parent)
    return target


def write_new_folder(root: Path, name: str, files: dict[str, str]) -> Path:
    """Create a folder ``root/name`` holding ``files`` (relative path → text); return its path.

    The files are written into a hidden staging folder and flushed to disk; the folder is then
    renamed to ``name``, or to ``name-2``, ``name-3``, ... when that is taken (an existing folder is
    never reused). Any failure, an interrupt included, removes the staging folder; a process killed
    outright can leave only a hidden ``.staging-*`` folder, which nothing reads.
    """
    with staged_folder(root, name, files) as staging, holding_interrupts():
        return place_folder(staging, root, name)


@contextlib.contextmanager
def staged_folder(root: Path, name: str, files: Mapping[str, str | bytes]) -> Iterator[Path]:
    """A hidden staging folder under ``root`` holding ``files``, each flushed to disk, for the body
    to put in place with `place_folder`. On leaving, whatever happened (an interrupt included), a
    staging folder that was not put in place is removed."""
    require_plain_name(name)
    try:
        root.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create the output folder: {exc.strerror or exc}", where=str(root),
                          hint="choose another folder with --out") from None
    staging: Path | None = None
    try:
        with holding_interrupts():  # an interrupt between creating the folder and knowing it would leave it
            staging = _new_staging(root, name)
        try:
            for relative, text in files.items():
                (staging / relative).parent.mkdir(parents=True, exist_ok=True)
                write_synced(staging / relative, text)
        except OSError as exc:
            raise _not_written(exc, root) from None
        yield staging
    finally:
        if staging is not None:
            shutil.rmtree(staging, ignore_errors=True)  # nothing there any more once it was put in place


def place_folder(staging: Path, root: Path, name: str, *, prepare: Callable[[str], None] | None = None) -> Path:
    """Rename the staging folder to ``name`` (or the next free ``name-k``) and make that durable.
    ``prepare(final_name)`` runs before each rename is tried, for content that names the folder."""
    try:
        final = _place(staging, root, name, prepare)
    except OSError as exc:
        raise _not_written(exc, root) from None
    sync_folder(root)
    return final


def _not_written(exc: OSError, root: Path) -> OutputError:
    return OutputError(f"the run could not be written: {exc.strerror or exc}", where=str(root),
                       hint="nothing was kept; free space or choose another folder with --out, then run again")


def write_synced(path: Path, text: str | bytes) -> None:
    """Write ``path`` (created or truncated; text as UTF-8, bytes as they are) and flush it to disk."""
    if isinstance(text, bytes):
        with open(path, "wb") as binary:
            binary.write(text)
            binary.flush()
            os.fsync(binary.fileno())
        return
    with open(path, "w", encoding="utf-8", newline="\n") as handle:
        handle.write(text)
        handle.flush()
        os.fsync(handle.fileno())


def require_plain_name(name: str) -> None:
    """Refuse a folder name that is not one plain visible name (plan ids are validated by the
    schema; this guards the writer itself against a path or a hidden name)."""
    plain = (bool(name) and not name.startswith(".") and "/" not in name and "\\" not in name
             and "\0" not in name and Path(name).name == name)
    if not plain:
        raise ValueError(f"folder name {name!r} is not a single plain folder name")


def _new_staging(root: Path, name: str) -> Path:
    """A staging folder of our own; the random part keeps a reused process id from colliding
    with a folder that a killed run left behind."""
    for _ in range(100):
        staging = root / f"{STAGING_PREFIX}{name}-{secrets.token_hex(4)}"
        try:
            staging.mkdir()
            return staging
        except FileExistsError:
            continue
        except OSError as exc:
            raise OutputError(f"cannot write into the output folder: {exc.strerror or exc}",
                              where=str(root), hint="choose another folder with --out") from None
    raise OutputError("cannot create a staging folder", where=str(root), hint="choose another folder with --out")


def _place(staging: Path, root: Path, name: str, prepare: Callable[[str], None] | None = None) -> Path:
    """Rename the staging folder to a name not yet taken. Another process may take the same name
    between the check and the rename: the rename then fails (the folder is not empty) and the next
    name is tried."""
    k = 1
    while True:
        candidate = root / (name if k == 1 else f"{name}-{k}")
        k += 1
        if candidate.exists() or candidate.is_symlink():
            continue
        if prepare is not None:
            prepare(candidate.name)
        try:
            os.rename(staging, candidate)
            return candidate
        except OSError as exc:
            if exc.errno in (errno.EEXIST, errno.ENOTEMPTY) and k < 10_000:
                continue
            raise


def sync_folder(folder: Path) -> None:
    """Make the rename itself durable (POSIX); harmless where folders cannot be opened."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


# --- reading ---------------------------------------------------------------------------------------

def read_json(path: str | Path, what: str, *, hint: str | None = None,
              error: type[PlanrunnerError] = RecordError) -> Any:
    """The parsed content of a JSON file, or ``error`` saying where (FILE:LINE:COL) and what is wrong.

    ``what`` names the file in messages ("record", "lock file", ...); ``hint`` says what to do.
    """
    file = Path(path)
    try:
        data = file.read_bytes()
    except FileNotFoundError:
        raise error(f"{what} not found", where=str(file), hint=hint) from None
    except IsADirectoryError:
        raise error(f"the {what} is a folder, not a file", where=str(file), hint=hint) from None
    except OSError as exc:
        raise error(f"cannot read the {what}: {exc.strerror or exc}", where=str(file), hint=hint) from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line, column = _position(data, exc.start)
        raise error(f"the {what} is not UTF-8 text (byte 0x{data[exc.start]:02x})",
                    where=f"{file}:{line}:{column}", hint=hint) from None
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise error(f"the {what} is not valid JSON: {exc.msg}", where=f"{file}:{exc.lineno}:{exc.colno}",
                    hint=hint) from None
    except RecursionError:
        raise error(f"the {what} is nested too deeply to be read", where=str(file), hint=hint) from None


def _position(data: bytes, offset: int) -> tuple[int, int]:
    """1-based line and column (in bytes) of a byte offset."""
    line = data.count(b"\n", 0, offset) + 1
    return line, offset - (data.rfind(b"\n", 0, offset) + 1) + 1
