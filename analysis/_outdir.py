"""Safe results folders: a run replaces only the files Tenfold itself wrote there, nothing else.

Every results folder holds a manifest, ``.tenfold-manifest.json``, listing each file a run wrote (path relative to
the folder, sha256). With ``overwrite`` a later run replaces exactly those files, and only while they still have the
recorded checksum: a file the user put there or changed counts as the user's and is never touched (the run is
refused, naming it). A folder that holds the input image (or is a parent of it) is refused outright.

A manifest may only name files inside its own folder, by plain relative paths (no ``..``, no absolute path, no
link on the way): one that names anything else refuses the run, so a crafted manifest cannot make ``overwrite``
delete a file elsewhere. Links are never followed out of the folder: a result path through a symlinked sub-folder,
or a symlinked result file, counts as the user's.

Writing is all or nothing: every file is staged in the work folder, every destination is checked before the first
move, and the files replaced are kept in the work folder until the last move succeeded (put back otherwise).

Work folders are named ``.<folder name>.writing-<pid>-<8 hex>`` (beside a new folder, or inside an existing one);
those left by a killed run (the pid no longer runs) are removed when the next run starts. Names that do not match
this pattern exactly are never touched.
"""

from __future__ import annotations

import errno
import json
import os
import re
import shutil
import signal
import uuid
from contextlib import contextmanager
from pathlib import Path

from . import _stop
from ._errors import TenfoldInputError
from .io import _sha256

__all__ = ["MANIFEST", "check_output_folder", "clean_stale", "work_folder", "commit", "fresh_commit"]

MANIFEST = ".tenfold-manifest.json"
#: below this much free space a run is refused before it starts (a results folder with figures of a 4k image
#: takes about 20 MB, measured on the bundled samples scaled up)
MIN_FREE_BYTES = 50 * 2**20
_WORK = re.compile(r"\.(?P<name>.+)\.(?P<kind>writing|old)-(?:(?P<pid>\d+)-)?[0-9a-f]{8}")
_SIGNALS = tuple(getattr(signal, s) for s in ("SIGINT", "SIGTERM", "SIGHUP") if hasattr(signal, s))




def _plain_rel(rel: str) -> bool:
    """``rel`` is a relative path of ordinary names inside a folder ('figures/a.png'; never '..', '/x', 'a//b')."""
    if not isinstance(rel, str) or not rel or rel.startswith("/") or "\\" in rel or "\0" in rel:
        return False
    return all(part not in ("", ".", "..") for part in rel.split("/"))


def _blocked(folder: Path, rel: str) -> str | None:
    """Why ``folder/rel`` cannot be a file Tenfold writes or removes, or None.

    A parent on the way that is a link or a file, or a destination that is a link or a folder, would make a
    write or a removal land outside the folder or fail half-way.
    """
    if not _plain_rel(rel):
        return "is not a plain path inside the folder"
    parts = rel.split("/")
    p = folder
    for part in parts[:-1]:
        p = p / part
        if p.is_symlink():
            return f"goes through the link {p.relative_to(folder).as_posix()}"
        if p.exists() and not p.is_dir():
            return f"goes through {p.relative_to(folder).as_posix()}, which is a file, not a folder"
        if not p.exists():
            return None
    dest = folder / rel
    if dest.is_symlink():
        return "is a link"
    if dest.exists() and not dest.is_file():
        return "is a folder or a special file, not a regular file"
    return None


def read_manifest(folder: Path) -> dict[str, str]:
    """relative path -> sha256 of the files a previous run wrote into ``folder`` ({} when none or unreadable).

    Raises
    ------
    TenfoldInputError
        The manifest names a path outside ``folder`` (``..``, an absolute path) or through a link: a manifest
        that Tenfold did not write, which must not steer what a run replaces or removes.
    """
    mpath = folder / MANIFEST
    if mpath.is_symlink():
        raise TenfoldInputError(f"{mpath}: is a link, not the manifest Tenfold writes; remove it (and replace the "
                                "results by hand) or choose another results folder")
    try:
        data = json.loads(mpath.read_text(encoding="utf-8"))
        files = data["files"]
        if not isinstance(files, dict):
            return {}
    except (OSError, ValueError, KeyError, TypeError):
        return {}
    bad = [str(k) for k in files if not _plain_rel(k)]
    if bad:
        raise TenfoldInputError(
            f"{mpath}: names {bad[0]!r}{f' and {len(bad) - 1} more' if len(bad) > 1 else ''}, which is not a file "
            "inside the results folder; Tenfold never writes such a manifest, so no file is replaced or removed: "
            "delete the manifest (the folder's files then count as yours) or choose another results folder"
        )
    return {str(k): str(v) for k, v in files.items()}


def _ours(folder: Path, rel: str, manifest: dict[str, str]) -> bool:
    """True when ``folder/rel`` is a regular file a previous run wrote and nobody changed since (no links)."""
    p = folder / rel
    if rel not in manifest or _blocked(folder, rel) is not None or not p.is_file():
        return False
    try:
        return _sha256(p) == manifest[rel]
    except OSError:
        return False


def _existing_ancestor(p: Path) -> Path:
    while not p.exists() and not p.is_symlink() and p != p.parent:
        p = p.parent
    return p


def _hint(flag: str) -> str:
    return "--overwrite" if flag.startswith("--") else "overwrite=True"


def check_output_folder(out, *, overwrite: bool, inputs=(), planned=None, flag: str = "out_dir",
                        replacer: str | None = None) -> Path:
    """Refuse, with one line naming ``flag`` and the path, a results folder that a run must not write into.

    Parameters
    ----------
    out : path-like
        The results folder.
    overwrite : bool
        Whether the user allowed Tenfold's own earlier results there to be replaced.
    inputs : iterable of path-like
        Input images; the folder may neither hold one nor be a parent of one (symlinks resolved).
    planned : iterable of str, optional
        Relative paths the run will write; an existing file among them that the manifest does not vouch for is
        the user's and refuses the run. None checks the top-level names every run writes.
    flag : str
        Name of the option in messages ('--out' for the command line).
    replacer : str, optional
        What would replace the files, in messages (default: ``--overwrite`` / ``overwrite=True``).

    Returns
    -------
    Path
        The folder, with ``~`` expanded.
    """
    out = Path(out).expanduser()
    try:
        return _check_output_folder(out, overwrite=overwrite, inputs=inputs, planned=planned, flag=flag,
                                    replacer=replacer)
    except OSError as exc:  # e.g. a parent folder without search permission: stat() itself fails
        raise TenfoldInputError(f"{flag} {out}: cannot be checked ({exc.strerror or exc}"
                                f"{f': {exc.filename}' if exc.filename else ''}); fix the permissions of the folder "
                                "and its parents, or choose another results folder") from None


def _check_output_folder(out: Path, *, overwrite: bool, inputs, planned, flag: str, replacer: str | None) -> Path:
    where = f"{flag} {out}"
    if out.exists() and not out.is_dir():
        raise TenfoldInputError(f"{where}: exists and is a file, not a folder; choose another results folder")
    if out.is_symlink() and not out.exists():
        raise TenfoldInputError(f"{where}: is a link to {os.readlink(out)}, which does not exist; create that "
                                "folder or choose another results folder")
    anc = _existing_ancestor(out)
    if anc != out and not anc.is_dir():
        raise TenfoldInputError(f"{where}: {anc} is a file, not a folder; choose a results folder path whose "
                                "parents are folders")
    real = Path(os.path.realpath(out))
    for inp in inputs:
        if not inp:
            continue
        ri = Path(os.path.realpath(inp))
        if ri == real or real in ri.parents:
            raise TenfoldInputError(f"{where}: holds the input image {inp}; results go into their own folder, "
                                    "choose a new or empty folder outside the input's folder")
    if not os.access(anc, os.W_OK | os.X_OK):
        raise TenfoldInputError(f"{where}: {anc} is read-only for you; choose a folder you can write to")
    try:
        free = shutil.disk_usage(anc).free
    except OSError:
        free = None
    if free is not None and free < MIN_FREE_BYTES:
        raise TenfoldInputError(f"{where}: only {free / 2**20:.0f} MB free on that disk, a run needs about "
                                f"{MIN_FREE_BYTES // 2**20} MB; free some space or choose another disk")
    if not out.is_dir():
        return out
    try:
        entries = [p for p in out.iterdir() if not _stale(p, out.name)]
    except OSError as exc:
        raise TenfoldInputError(f"{where}: cannot be listed ({exc.strerror or exc}); fix its permissions "
                                "(chmod u+rwx) or choose another results folder") from None
    if not entries:
        return out
    if not overwrite:
        raise TenfoldInputError(f"{where}: results folder exists and is not empty; choose a new folder, or add "
                                f"{_hint(flag)} to replace Tenfold's earlier results there (other files are kept)")
    manifest = read_manifest(out)
    names = planned if planned is not None else _TOP_LEVEL
    clash = sorted(r for r in names if (_blocked(out, r) is not None or (out / r).exists() or (out / r).is_symlink())
                   and not _ours(out, r, manifest))
    if planned is None:  # the pre-flight check: the sub-folders every run writes into must be real folders
        clash += sorted(d + "/" for d in _TOP_DIRS
                        if (out / d).is_symlink() or (out / d).exists() and not (out / d).is_dir())
    if clash:
        shown = ", ".join(clash[:5]) + (f" and {len(clash) - 5} more" if len(clash) > 5 else "")
        raise TenfoldInputError(
            f"{where}: {shown} {'is' if len(clash) == 1 else 'are'} not Tenfold's own unchanged result"
            f"{'' if len(clash) == 1 else 's'} (not in {MANIFEST} or changed since), so {replacer or _hint(flag)} will not "
            "replace it; move it away or choose another folder"
        )
    return out


#: names every run writes at the top level (the pre-flight check of the command line uses them)
_TOP_LEVEL = ("summary.json", "provenance.json", "results.xlsx", "columns.csv")
#: sub-folders runs write into: a link or a file of that name is in the way
_TOP_DIRS = ("figures", "curves")


def _stale(p: Path, name: str) -> bool:
    """``p`` is a work folder/link of an earlier run for results folder ``name`` that no longer runs."""
    m = _WORK.fullmatch(p.name)
    if m is None or m["name"] != name:
        return False
    pid = m["pid"]
    if pid is None:
        return True  # the naming before pids were recorded
    if int(pid) == os.getpid():
        return False
    try:
        os.kill(int(pid), 0)
    except ProcessLookupError:
        return True
    except (OSError, OverflowError):  # beyond any process id: a look-alike name, not a work folder of ours
        return False
    return False


def clean_stale(out: Path) -> list[Path]:
    """Remove work folders and links that killed runs left beside or inside ``out``; returns what was removed."""
    removed = []
    for folder in (out.parent, out):
        if not folder.is_dir():
            continue
        try:
            items = list(folder.iterdir())
        except OSError:
            continue
        for p in items:
            if not _stale(p, out.name):
                continue
            if p.is_symlink() or not p.is_dir():
                p.unlink(missing_ok=True)
            else:
                shutil.rmtree(p, ignore_errors=True)
            removed.append(p)
    return removed


def work_folder(out: Path) -> Path:
    """A new hidden work folder: beside ``out`` when it does not exist yet, else inside it."""
    base = out if out.is_dir() else out.parent
    base.mkdir(parents=True, exist_ok=True)
    tmp = base / f".{out.name}.writing-{os.getpid()}-{uuid.uuid4().hex[:8]}"
    tmp.mkdir()
    return tmp


def _manifest(tmp: Path, rels: list[str]) -> dict:
    return {"tenfold_manifest": 1, "note": "files written by Tenfold; --overwrite replaces only these, while unchanged",
            "files": {r: _sha256(tmp / r) for r in sorted(rels)}}


def _stage_manifest(tmp: Path, manifest: dict, name: str) -> Path:
    """Write the manifest inside the work folder (ours alone: a link named like it elsewhere is never followed)."""
    part = tmp / name
    part.write_text(json.dumps(manifest, indent=1) + "\n", encoding="utf-8")
    return part


@contextmanager
def _signals_held():
    """Hold SIGINT/SIGTERM/SIGHUP while files are moved into place (delivered right after).

    A signal whose exception was swallowed earlier (see :mod:`._stop`) stops the move before it starts.
    """
    try:
        old = signal.pthread_sigmask(signal.SIG_BLOCK, _SIGNALS)
    except (AttributeError, ValueError, OSError):
        old = None
    try:
        _stop.raise_if_pending()
        yield
    finally:
        if old is not None:
            signal.pthread_sigmask(signal.SIG_SETMASK, old)


def fresh_commit(tmp: Path, out: Path, rels: list[str]) -> None:
    """``out`` did not exist: give ``tmp`` its manifest and rename it into place in one step."""
    _stage_manifest(tmp, _manifest(tmp, rels), MANIFEST)
    with _signals_held():
        try:
            tmp.rename(out)
        except OSError as exc:
            if exc.errno in (errno.EEXIST, errno.ENOTEMPTY):
                raise TenfoldInputError(f"{out}: another program created this folder while the results were "
                                        "being written; nothing was changed there, run again") from None
            raise


class _Moves:
    """File moves that can be undone in reverse order (all or nothing)."""

    def __init__(self) -> None:
        self.done: list[tuple[Path, Path]] = []
        self.made: list[Path] = []

    def mkdirs(self, folder: Path, top: Path) -> None:
        missing = []
        while folder != top and not folder.exists():
            missing.append(folder)
            folder = folder.parent
        for d in reversed(missing):
            d.mkdir()
            self.made.append(d)

    def move(self, src: Path, dst: Path, top: Path) -> None:
        self.mkdirs(dst.parent, top)
        os.replace(src, dst)
        self.done.append((src, dst))

    def undo(self) -> None:
        for src, dst in reversed(self.done):
            try:
                os.replace(dst, src)
            except OSError:
                pass
        for d in reversed(self.made):
            try:
                d.rmdir()
            except OSError:
                pass


def commit(tmp: Path, out: Path, rels: list[str], *, flag: str = "out_dir") -> None:
    """``out`` exists: move the files of ``tmp`` into it, replacing only Tenfold's own earlier results.

    Every destination is checked first (a user's file, a link or a file where a folder goes refuses the run
    before anything moves). Earlier results that this run does not write again (e.g. a figure that no longer
    applies) are removed when their checksum still matches the old manifest; every other file in ``out`` is left
    as it is. The replaced files wait in ``tmp`` until the last move succeeded, and are put back if one fails.
    """
    old = read_manifest(out)
    check_output_folder(out, overwrite=True, planned=rels, flag=flag)  # nobody put a file in the way meanwhile
    blocked = [(r, why) for r in rels if (why := _blocked(out, r)) is not None and not _ours(out, r, old)]
    if blocked:
        rel, why = blocked[0]
        raise TenfoldInputError(f"{flag} {out}: {rel} {why}; nothing was changed there, move it away or choose "
                                "another results folder")
    gone = [r for r in sorted(set(old) - set(rels)) if _ours(out, r, old)]
    part = _stage_manifest(tmp, _manifest(tmp, rels), f"{MANIFEST}.part")
    keep = tmp / ".replaced"
    moves = _Moves()
    with _signals_held():
        try:
            for rel in rels:
                if (out / rel).exists():
                    moves.move(out / rel, keep / rel, tmp)
                moves.move(tmp / rel, out / rel, out)
            for rel in gone:
                moves.move(out / rel, keep / rel, tmp)
            os.replace(part, out / MANIFEST)
        except BaseException:
            moves.undo()
            raise
        for rel in gone:
            parent = (out / rel).parent
            while parent != out and parent.is_dir() and not parent.is_symlink() and not any(parent.iterdir()):
                parent.rmdir()
                parent = parent.parent
        shutil.rmtree(tmp, ignore_errors=True)
