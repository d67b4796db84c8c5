"""Results folders: --overwrite replaces only Tenfold's own files (manifest), never the user's or the input image.

Made-up demo tables (format plumbing only) from tests/test_export.py; the folder rules are the subject here.
"""

from __future__ import annotations

import dataclasses
import errno
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from types import SimpleNamespace

import pytest

from tenfold.analysis import _outdir, export
from tenfold.analysis._errors import TenfoldInputError
from tenfold.analysis.cli import main
from tenfold.analysis.export import write_results

sys.path.insert(0, str(Path(__file__).parent))
from test_export import _demo_result  # noqa: E402

SAMPLE = Path(__file__).resolve().parents[1] / "sample_images" / "decagonal_haadf_vacancies.tif"


def _with_input(result, path: Path):
    return dataclasses.replace(result, meta=dataclasses.replace(result.meta, path=str(path.resolve())))


@pytest.fixture
def result():
    return _demo_result()


def test_manifest_lists_every_file_with_checksum(tmp_path, result):
    out = tmp_path / "res"
    files = write_results(result, out, figures=False)
    manifest = json.loads((out / _outdir.MANIFEST).read_text())["files"]
    assert sorted(manifest) == sorted(p.relative_to(out).as_posix() for p in files)
    assert manifest["summary.json"] == _outdir._sha256(out / "summary.json")


def test_overwrite_keeps_user_files_in_folder(tmp_path, result):
    out = tmp_path / "res"
    write_results(result, out, figures=False)
    (out / "notes.txt").write_text("my notes")
    (out / "raw.tif").write_bytes(b"II*\0user data")
    write_results(result, out, overwrite=True, figures=False)
    assert (out / "notes.txt").read_text() == "my notes"
    assert (out / "raw.tif").read_bytes() == b"II*\0user data"


def test_overwrite_refuses_user_file_with_result_name(tmp_path, result):
    out = tmp_path / "res"
    out.mkdir()
    (out / "summary.json").write_text('{"mine": 1}')
    with pytest.raises(TenfoldInputError, match=r"summary\.json is not Tenfold's own"):
        write_results(result, out, overwrite=True, figures=False)
    assert (out / "summary.json").read_text() == '{"mine": 1}'
    assert sorted(p.name for p in out.iterdir()) == ["summary.json"]


def test_overwrite_refuses_result_changed_by_user(tmp_path, result):
    out = tmp_path / "res"
    write_results(result, out, figures=False)
    (out / "columns.csv").write_text("edited by hand\n")
    with pytest.raises(TenfoldInputError, match=r"columns\.csv is not Tenfold's own unchanged"):
        write_results(result, out, overwrite=True, figures=False)
    assert (out / "columns.csv").read_text() == "edited by hand\n"


def test_overwrite_removes_own_result_no_longer_written(tmp_path, result):
    out = tmp_path / "res"
    write_results(result, out, figures=False)
    fewer = dataclasses.replace(result, curves={})
    write_results(fewer, out, overwrite=True, figures=False)
    assert not (out / "curves").exists()


def test_refuses_folder_holding_input(tmp_path, result):
    data = tmp_path / "data"
    data.mkdir()
    (data / "scan.tif").write_bytes(b"user image")
    (data / "notebook.ipynb").write_text("{}")
    with pytest.raises(TenfoldInputError, match="holds the input image"):
        write_results(_with_input(result, data / "scan.tif"), data, overwrite=True, figures=False)
    assert sorted(p.name for p in data.iterdir()) == ["notebook.ipynb", "scan.tif"]


def test_refuses_parent_of_input(tmp_path, result):
    (tmp_path / "data").mkdir()
    (tmp_path / "data" / "scan.tif").write_bytes(b"user image")
    with pytest.raises(TenfoldInputError, match="holds the input image"):
        write_results(_with_input(result, tmp_path / "data" / "scan.tif"), tmp_path, overwrite=True, figures=False)
    assert (tmp_path / "data" / "scan.tif").read_bytes() == b"user image"


def test_refuses_symlinked_folder_holding_input(tmp_path, result):
    data = tmp_path / "data"
    data.mkdir()
    (data / "scan.tif").write_bytes(b"user image")
    link = tmp_path / "link"
    link.symlink_to(data, target_is_directory=True)
    with pytest.raises(TenfoldInputError, match="holds the input image"):
        write_results(_with_input(result, data / "scan.tif"), link, overwrite=True, figures=False)
    assert (data / "scan.tif").read_bytes() == b"user image"


def test_symlinked_folder_overwrite_keeps_link_and_leaves_no_work_links(tmp_path, result):
    real = tmp_path / "real"
    real.mkdir()
    link = tmp_path / "link"
    link.symlink_to(real, target_is_directory=True)
    write_results(result, link, figures=False)
    write_results(result, link, overwrite=True, figures=False)
    assert link.is_symlink() and (real / "columns.csv").is_file()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["link", "real"]
    assert not [p for p in real.iterdir() if p.name.startswith(".link.")]


def test_cli_out_dot_refused_when_input_in_cwd(tmp_path, monkeypatch, capsys):
    img = tmp_path / "scan.tif"
    img.write_bytes(SAMPLE.read_bytes())
    (tmp_path / "notes.txt").write_text("mine")
    monkeypatch.chdir(tmp_path)
    rc = main(["analyze", "scan.tif", "--out", ".", "--overwrite", "--quiet"])
    err = capsys.readouterr().err.strip()
    assert rc == 2 and "--out .: holds the input image" in err and len(err.splitlines()) == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.txt", "scan.tif"]


def test_cli_out_dotdot_refused_when_input_below(tmp_path, monkeypatch, capsys):
    sub = tmp_path / "work"
    sub.mkdir()
    img = sub / "scan.tif"
    img.write_bytes(SAMPLE.read_bytes())
    monkeypatch.chdir(sub)
    rc = main(["analyze", "scan.tif", "--out", "..", "--overwrite", "--quiet"])
    assert rc == 2 and "holds the input image" in capsys.readouterr().err
    assert img.read_bytes() == SAMPLE.read_bytes()


def test_stale_work_folders_of_killed_runs_removed(tmp_path, result):
    out = tmp_path / "res"
    (tmp_path / ".res.writing-1a2b3c4d").mkdir()                      # naming before pids were recorded
    (tmp_path / ".res.writing-99999999-0123abcd").mkdir()             # pid that does not run
    (tmp_path / ".res.old-deadbeef").symlink_to(tmp_path)             # link left by a folder swap
    (tmp_path / ".res.writing-notes").mkdir()                         # the user's, not our pattern
    (tmp_path / ".other.writing-1a2b3c4d").mkdir()                    # another results folder's
    write_results(result, out, figures=False)
    assert sorted(p.name for p in tmp_path.iterdir()) == [".other.writing-1a2b3c4d", ".res.writing-notes", "res"]


def test_running_runs_work_folder_kept(tmp_path, result):
    live = tmp_path / f".res.writing-{os.getppid()}-0123abcd"
    live.mkdir()
    write_results(result, tmp_path / "res", figures=False)
    assert live.is_dir()


def test_full_disk_while_writing_names_folder(tmp_path, result, monkeypatch):
    def full(*args, **kwargs):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(export, "_write_workbook", full)
    with pytest.raises(TenfoldInputError, match=r"res: results could not be written \(No space left on device"):
        write_results(result, tmp_path / "res", figures=False)
    assert list(tmp_path.iterdir()) == []


def test_full_disk_refused_up_front(tmp_path, monkeypatch, capsys):
    monkeypatch.setattr(_outdir.shutil, "disk_usage", lambda p: SimpleNamespace(free=10 * 2**20))
    rc = main(["analyze", str(SAMPLE), "--out", str(tmp_path / "res"), "--quiet"])
    assert rc == 2 and "only 10 MB free" in capsys.readouterr().err


def test_read_only_folder_refused_up_front(tmp_path, monkeypatch, capsys):
    monkeypatch.setattr(_outdir.os, "access", lambda p, mode: False)
    rc = main(["analyze", str(SAMPLE), "--out", str(tmp_path / "res"), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2 and "read-only" in err and str(tmp_path) in err


def test_out_below_a_file_refused_up_front(tmp_path, capsys):
    (tmp_path / "afile").write_text("x")
    rc = main(["analyze", str(SAMPLE), "--out", str(tmp_path / "afile" / "sub"), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2 and "afile is a file, not a folder" in err and "--out" in err


def _wait_for(proc, text: str, timeout: float = 120.0) -> str:
    seen = ""
    t0 = time.monotonic()
    while text not in seen and time.monotonic() - t0 < timeout:
        line = proc.stderr.readline()
        if not line:
            break
        seen += line
    return seen


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGHUP], ids=["SIGTERM", "SIGHUP"])
def test_signal_is_a_clean_interrupt(tmp_path, sig):
    out = tmp_path / "res"
    proc = subprocess.Popen([sys.executable, "-m", "tenfold.analysis.cli", "analyze", str(SAMPLE), "--out", str(out)],
                            stderr=subprocess.PIPE, stdout=subprocess.PIPE, text=True, env=os.environ.copy())
    _wait_for(proc, "finding atomic columns")
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 128 + sig, err
    assert "interrupted" in err and "Traceback" not in err
    assert list(tmp_path.iterdir()) == []


def test_dangling_link_refused_and_kept(tmp_path, result):
    link = tmp_path / "res"
    link.symlink_to(tmp_path / "gone")
    with pytest.raises(TenfoldInputError, match="is a link to .*gone, which does not exist"):
        write_results(result, link, figures=False)
    assert link.is_symlink() and not (tmp_path / "gone").exists()
