"""Safe results folders: a run replaces only the files Tenfold itself wrote there, nothing else.

Every results folder holds a manifest, ``.tenfold-manifest.json``, listing each file a run wrote (path relative to
the folder, sha256). With ``overwrite`` a later run replaces exactly those files, and only while they still have the
recorded checksum: a file the user put there or changed counts as the user's and is never touched (the run is
refused, naming it). A folder that holds the input image (or is a parent of it) is refused outright.

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

from ._errors import TenfoldInputError
from .io import _sha256

__all__ = ["MANIFEST", "check_output_folder", "clean_stale", "work_folder", "commit", "fresh_commit"]

MANIFEST = ".tenfold-manifest.json"
#: below this much free space a run is refused before it starts (a results folder with figures of a 4k image
#: takes about 20 MB, measured on the bundled samples scaled up)
MIN_FREE_BYTES = 50 * 2**20
_WORK = re.compile(r"\.(?P<name>.+)\.(?P<kind>writing|old)-(?:(?P<pid>\d+)-)?[0-9a-f]{8}")
_SIGNALS = tuple(getattr(signal, s) for s in ("SIGINT", "SIGTERM", "SIGHUP") if hasattr(signal, s))


def read_manifest(folder: Path) -> dict[str, str]:
    """relative path -> sha256 of the files a previous run wrote into ``folder`` ({} when none or unreadable)."""
    try:
        data = json.loads((folder / MANIFEST).read_text(encoding="utf-8"))
        files = data["files"]
        return {str(k): str(v) for k, v in files.items()} if isinstance(files, dict) else {}
    except (OSError, ValueError, KeyError, TypeError):
        return {}


def _ours(folder: Path, rel: str, manifest: dict[str, str]) -> bool:
    """True when ``folder/rel`` is a regular file a previous run wrote and nobody changed since."""
    p = folder / rel
    if rel not in manifest or p.is_symlink() or not p.is_file():
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


def check_output_folder(out, *, overwrite: bool, inputs=(), planned=None, flag: str = "out_dir") -> Path:
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

    Returns
    -------
    Path
        The folder, with ``~`` expanded.
    """
    out = Path(out).expanduser()
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
    entries = [p for p in out.iterdir() if not _stale(p, out.name)]
    if not entries:
        return out
    if not overwrite:
        raise TenfoldInputError(f"{where}: results folder exists and is not empty; choose a new folder, or add "
                                f"{_hint(flag)} to replace Tenfold's earlier results there (other files are kept)")
    manifest = read_manifest(out)
    names = planned if planned is not None else _TOP_LEVEL
    clash = sorted(r for r in names if (out / r).exists() and not _ours(out, r, manifest))
    if clash:
        shown = ", ".join(clash[:5]) + (f" and {len(clash) - 5} more" if len(clash) > 5 else "")
        raise TenfoldInputError(
            f"{where}: {shown} {'is' if len(clash) == 1 else 'are'} not Tenfold's own unchanged result"
            f"{'' if len(clash) == 1 else 's'} (not in {MANIFEST} or changed since), so {_hint(flag)} will not "
            "replace it; move it away or choose another folder"
        )
    return out


#: names every run writes at the top level (the pre-flight check of the command line uses them)
_TOP_LEVEL = ("summary.json", "provenance.json", "results.xlsx", "columns.csv")


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
    except OSError:
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


def _write_manifest(folder: Path, manifest: dict) -> None:
    part = folder / f"{MANIFEST}.part"
    part.write_text(json.dumps(manifest, indent=1) + "\n", encoding="utf-8")
    os.replace(part, folder / MANIFEST)


@contextmanager
def _signals_held():
    """Hold SIGINT/SIGTERM/SIGHUP while files are moved into place (delivered right after)."""
    try:
        old = signal.pthread_sigmask(signal.SIG_BLOCK, _SIGNALS)
    except (AttributeError, ValueError, OSError):
        old = None
    try:
        yield
    finally:
        if old is not None:
            signal.pthread_sigmask(signal.SIG_SETMASK, old)


def fresh_commit(tmp: Path, out: Path, rels: list[str]) -> None:
    """``out`` did not exist: give ``tmp`` its manifest and rename it into place in one step."""
    _write_manifest(tmp, _manifest(tmp, rels))
    with _signals_held():
        try:
            tmp.rename(out)
        except OSError as exc:
            if exc.errno in (errno.EEXIST, errno.ENOTEMPTY):
                raise TenfoldInputError(f"{out}: another program created this folder while the results were "
                                        "being written; nothing was changed there, run again") from None
            raise


def commit(tmp: Path, out: Path, rels: list[str], *, flag: str = "out_dir") -> None:
    """``out`` exists: move the files of ``tmp`` into it, replacing only Tenfold's own earlier results.

    Earlier results that this run does not write again (e.g. a figure that no longer applies) are removed when
    their checksum still matches the old manifest; every other file in ``out`` is left as it is.
    """
    old = read_manifest(out)
    check_output_folder(out, overwrite=True, planned=rels, flag=flag)  # nobody put a file in the way meanwhile
    new = _manifest(tmp, rels)
    with _signals_held():
        for rel in rels:
            dest = out / rel
            dest.parent.mkdir(parents=True, exist_ok=True)
            os.replace(tmp / rel, dest)
        for rel in sorted(set(old) - set(rels)):
            if _ours(out, rel, old):
                (out / rel).unlink()
                parent = (out / rel).parent
                if parent != out and not any(parent.iterdir()):
                    parent.rmdir()
        _write_manifest(out, new)
        shutil.rmtree(tmp, ignore_errors=True)
