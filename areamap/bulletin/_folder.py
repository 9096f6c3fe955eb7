"""The output folder of a bulletin: ownership marker, symlink policy, crash-safe swap, leftovers, lock.

Guarantees (see the user guide, "Publishing guarantees"):

* Only a folder areamap made is ever replaced: it carries the marker file
  :data:`MARKER_NAME` (folders written before the marker existed are
  recognised by their ``run.json``). Anything else -- a hand-written
  ``index.html``, an unrelated folder -- is refused with exit code 2.
* ``--out`` given as a symbolic link is followed: the bulletin is published
  into the link's target folder (same rules), and the link is kept.
* The new folder replaces the old one with one atomic exchange of the two
  directory entries (Linux ``renameat2(RENAME_EXCHANGE)``), so the output
  path never goes missing. Where the exchange is not available, two renames
  are used and a crash in between is repaired by the next run.
* The replaced folder's permission bits are given to the new folder.
* Leftovers of interrupted runs (``.NAME.tmp-*``, ``.NAME.previous-*``) are
  cleaned, or restored when the output folder is missing, by the next run.
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import json
import os
import shutil
import stat
import time
from collections.abc import Iterator
from pathlib import Path

from ..errors import AreamapError, InputError, format_examples

#: Hidden file that marks a folder as a bulletin written by areamap (JSON: tool, run id, period, public).
MARKER_NAME = ".areamap-bulletin.json"

#: Files of a bulletin folder besides the marker.
OUTPUT_FILES = ("index.html", "areas.csv", "areas.gpkg", "run.json")


class PublishBusyError(AreamapError):
    """Another run is publishing into the same output folder."""


# --------------------------------------------------------------------------- marker
def write_marker(folder: Path, info: dict) -> None:
    (folder / MARKER_NAME).write_text(json.dumps({"tool": "areamap", **info}, indent=1) + "\n", encoding="utf-8")


def read_marker(folder: Path) -> dict | None:
    """The marker of a bulletin folder; for folders of older areamap versions, facts from run.json; else None."""
    try:
        data = json.loads((folder / MARKER_NAME).read_text(encoding="utf-8"))
        if isinstance(data, dict) and data.get("tool") == "areamap":
            return data
    except (OSError, ValueError):
        pass
    # before the marker existed: only output files, and a run.json written by areamap
    try:
        names = {p.name for p in folder.iterdir()}
        if not names or not names <= set(OUTPUT_FILES) or "run.json" not in names:
            return None
        run = json.loads((folder / "run.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if isinstance(run, dict) and run.get("tool") == "areamap":
        return {"tool": "areamap", "run_id": None, "period": (run.get("period") or {}).get("key"),
                "public": bool(run.get("public", False)), "legacy": True}
    return None


# --------------------------------------------------------------------------- checks
def resolve_out(out: Path) -> tuple[Path, list[str]]:
    """The real output folder and notes: a symbolic link is followed to its target (the link is kept)."""
    notes: list[str] = []
    if out.is_symlink():
        try:
            target = out.resolve(strict=True)
        except FileNotFoundError:
            raise InputError(
                f"The output path {out} is a symbolic link to {os.readlink(out)}, which does not exist. Create "
                "the target folder, remove the link, or choose another folder (--out DIR)."
            ) from None
        except (RuntimeError, OSError):  # RuntimeError: symlink loop (Python < 3.13)
            raise InputError(
                f"The output path {out} is a symbolic link that points back to itself. Fix the link or choose "
                "another folder (--out DIR)."
            ) from None
        notes.append(f"The output path {out} is a symbolic link: the bulletin was published into its target "
                     f"{target}, and the link was kept.")
        return target, notes
    try:
        parent = out.parent.resolve(strict=False)
    except (RuntimeError, OSError):
        raise InputError(f"The folder containing the output path {out} is a symbolic link loop.") from None
    return parent / out.name, notes


def check_replaceable(out: Path, inputs: list[tuple[str, Path]], *, public: bool, replace_public: bool) -> None:
    """Refuse an output folder that is not areamap's own, holds inputs, or would lose public suppression."""
    if out.exists() and not out.is_dir():
        raise InputError(f"The output path {out} exists and is a file. Give a folder for the bulletin (--out DIR).")
    for role, p in inputs:
        try:
            Path(p).resolve().relative_to(out)
        except (ValueError, RuntimeError, OSError):
            continue
        raise InputError(
            f"The output folder {out} contains the {role} file {p}; a bulletin run replaces its output folder. "
            "Choose a separate output folder (--out DIR)."
        )
    if not out.is_dir():
        return
    try:
        content = sorted(p.name for p in out.iterdir())
    except PermissionError:
        raise InputError(f"The output folder {out} cannot be read (permission denied); areamap only replaces "
                         "folders it can check are its own.") from None
    if not content:
        return  # an empty folder: nothing to lose
    marker = read_marker(out)
    if marker is None:
        raise InputError(
            f"The output folder {out} was not written by areamap (it has no {MARKER_NAME} marker) and holds "
            f"{format_examples(content)}. A bulletin run replaces the whole folder, so areamap only replaces "
            "its own folders: choose an empty or new folder (--out DIR), or move these files away."
        )
    extra = [n for n in content if n not in OUTPUT_FILES and n != MARKER_NAME]
    if extra:
        raise InputError(
            f"The output folder {out} holds files that are not bulletin outputs ({format_examples(extra)}); "
            "they would be deleted when the folder is replaced. Move them away or choose another folder (--out DIR)."
        )
    if marker.get("public") and not public and not replace_public:
        raise InputError(
            f"The output folder {out} holds a public bulletin (small counts suppressed); this run is not public "
            "and would replace it with unsuppressed tables. Run with --public, choose another folder, or pass "
            "--replace-public (replace_public=True) if that is really intended."
        )


def folder_mode(out: Path) -> int | None:
    """Permission bits of an existing folder (kept for its replacement), else None."""
    try:
        return stat.S_IMODE(os.stat(out).st_mode)
    except OSError:
        return None


# --------------------------------------------------------------------------- swap
def _renameat2_exchange(a: Path, b: Path) -> bool:
    """Atomically exchange two directory entries (Linux >= 3.15); False when not available here."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        fn = libc.renameat2
    except (OSError, AttributeError):
        return False
    at_fdcwd, rename_exchange = -100, 2
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    rc = fn(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), rename_exchange)
    if rc == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.ENOSYS, errno.EINVAL, errno.EOPNOTSUPP):
        return False
    raise OSError(err, os.strerror(err), str(a), None, str(b))


def swap_in(new: Path, out: Path, previous: Path) -> bool:
    """Put folder ``new`` at ``out``; the old ``out`` (if any) ends at ``previous``. True when there was one.

    With an atomic exchange the output path is never missing; otherwise two renames are used and
    :func:`recover` repairs a crash between them.
    """
    if not out.exists():
        os.rename(new, out)
        return False
    if _renameat2_exchange(new, out):
        try:
            os.rename(new, previous)  # `new` now holds the old folder
        except OSError:
            _renameat2_exchange(new, out)  # put the old folder back before the caller removes `new`
            raise
        return True
    os.rename(out, previous)
    try:
        os.rename(new, out)
    except OSError:
        os.rename(previous, out)
        raise
    return True


def swap_back(out: Path, previous: Path, discard: Path) -> None:
    """Undo :func:`swap_in`: the published folder goes to ``discard``, ``previous`` back to ``out``."""
    if previous.exists():
        if _renameat2_exchange(previous, out):
            os.rename(previous, discard)
            return
        os.rename(out, discard)
        os.rename(previous, out)
    elif out.exists():
        os.rename(out, discard)


# --------------------------------------------------------------------------- leftovers and lock
def leftovers(out: Path) -> tuple[list[Path], list[Path]]:
    """Temporary and previous folders of interrupted runs next to ``out`` (newest last)."""
    parent = out.parent
    if not parent.is_dir():
        return [], []
    tmp = sorted((p for p in parent.glob(f".{out.name}.tmp-*") if p.is_dir() and not p.is_symlink()),
                 key=lambda p: p.stat().st_mtime)
    prev = sorted((p for p in parent.glob(f".{out.name}.previous-*") if p.is_dir() and not p.is_symlink()),
                  key=lambda p: p.stat().st_mtime)
    return tmp, prev


def _is_ours(folder: Path) -> bool:
    """A leftover areamap may delete: it carries the marker, or holds nothing but output files."""
    try:
        names = {p.name for p in folder.iterdir()}
    except OSError:
        return False
    return read_marker(folder) is not None or names <= {*OUTPUT_FILES, MARKER_NAME}


def clean_leftovers(out: Path) -> list[str]:
    """Restore a missing output folder from the newest previous one, then delete areamap's leftovers."""
    notes: list[str] = []
    tmp, prev = leftovers(out)
    prev = [p for p in prev if _is_ours(p)]
    if not out.exists() and prev:
        os.rename(prev[-1], out)
        notes.append(f"Restored the bulletin folder {out} from {prev[-1].name}, left by an interrupted run.")
        prev = prev[:-1]
    removed = [p for p in [*tmp, *prev] if _is_ours(p)]
    for p in removed:
        shutil.rmtree(p, ignore_errors=True)
    if removed:
        notes.append(f"Removed {len(removed)} leftover folder(s) of interrupted runs next to {out} "
                     f"({format_examples(p.name for p in removed)}).")
    return notes


@contextlib.contextmanager
def publish_lock(out: Path, *, timeout: float = 30.0) -> Iterator[None]:
    """Hold an exclusive lock on ``out``'s parent folder so two runs publish into one folder in turn."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX: runs are not serialised here
        yield
        return
    # lock the parent folder itself (flock works on a directory descriptor): no lock file is left behind;
    # runs publishing into different folders of the same parent also take turns, which costs little
    fd = os.open(out.parent, os.O_RDONLY)
    try:
        deadline = time.monotonic() + timeout
        while True:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except BlockingIOError:
                if time.monotonic() > deadline:
                    raise PublishBusyError(
                        f"Another bulletin run is publishing into {out} (waited {timeout:g} s). Wait for it to "
                        "finish and run again."
                    ) from None
                time.sleep(0.1)
        try:
            yield
        finally:
            fcntl.flock(fd, fcntl.LOCK_UN)
    finally:
        os.close(fd)
