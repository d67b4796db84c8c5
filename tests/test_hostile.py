"""Hostile inputs (issue 17): each test reproduces a case that broke a promise, then checks the promise holds.

Results folders use the made-up demo result of tests/test_export.py (format plumbing only); batches use a stand-in
for the per-image analysis (the batch level's own files are the subject); images are crops of a bundled sample.
Hypothesis runs derandomized with small example counts so the file stays fast.
"""

from __future__ import annotations

import json
import os
import signal
import sys
import weakref
from pathlib import Path

import numpy as np
import pytest
import tifffile
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from tenfold.analysis import _outdir, _stop, batch, export
from tenfold.analysis._errors import TenfoldInputError, TenfoldWarning
from tenfold.analysis._guards import check_lengths
from tenfold.analysis._resources import cap_workers, usable_cores
from tenfold.analysis._sanitize import float32_plan, mask_flat, poisson_zeros, to_float32
from tenfold.analysis.cli import main
from tenfold.analysis.export import write_results
from tenfold.analysis.io import micrograph_from_array, read_micrograph
from tenfold.analysis.parallel import Execution

sys.path.insert(0, str(Path(__file__).parent))
from test_export import _demo_result  # noqa: E402

SAMPLES = Path(__file__).resolve().parents[1] / "sample_images"
SERIAL = Execution(workers=1)
FAST = settings(max_examples=30, deadline=None, derandomize=True, suppress_health_check=list(HealthCheck))


@pytest.fixture(scope="module")
def counts():
    """A 128 x 128 crop of the low-dose sample: whole-number detector counts 0-58 (a Poisson image)."""
    return tifffile.imread(SAMPLES / "decagonal_haadf_low_dose.tif")[:128, :128]


@pytest.fixture
def results(tmp_path):
    out = tmp_path / "res"
    write_results(_demo_result(), out, figures=False)
    return out


def _snapshot(folder: Path) -> dict:
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


# ---------------------------------------------------------------------------------------------------------------
# 1. a manifest names only files inside its folder; links are never followed out of it


def _plant(out: Path, key: str, victim: Path) -> None:
    m = json.loads((out / _outdir.MANIFEST).read_text())
    m["files"][key] = _outdir._sha256(victim)
    (out / _outdir.MANIFEST).write_text(json.dumps(m))


@pytest.mark.parametrize("how", ["dotdot", "absolute", "nested_dotdot", "input_image"])
def test_manifest_naming_outside_files_refuses_overwrite(tmp_path, results, how):
    victim = tmp_path / "victim.tif"
    victim.write_bytes(b"II*\0the user's input image")
    key = {"dotdot": "../victim.tif", "absolute": str(victim), "nested_dotdot": "figures/../../victim.tif",
           "input_image": "./../victim.tif"}[how]
    _plant(results, key, victim)
    with pytest.raises(TenfoldInputError, match="not a file inside the results folder"):
        write_results(_demo_result(), results, overwrite=True, figures=False)
    assert victim.read_bytes() == b"II*\0the user's input image"


_PART = st.sampled_from(["..", ".", "", "a", "figures", "x.csv", "/", "\\", "..\\b", "~"])


@FAST
@given(st.lists(_PART, min_size=1, max_size=5).map(lambda parts: "/".join(parts)))
def test_manifest_keys_either_refused_or_inside(tmp_path_factory, key):
    folder = tmp_path_factory.mktemp("m")
    (folder / _outdir.MANIFEST).write_text(json.dumps({"files": {key: "0" * 64}}))
    try:
        manifest = _outdir.read_manifest(folder)
    except TenfoldInputError:
        return
    for rel in manifest:
        target = Path(os.path.normpath(folder / rel))
        assert folder in target.parents and not Path(rel).is_absolute() and ".." not in rel.split("/")


def test_manifest_part_link_is_not_followed(tmp_path, results):
    user = tmp_path / "thesis.txt"
    user.write_text("chapter 1")
    (results / f"{_outdir.MANIFEST}.part").symlink_to(user)
    write_results(_demo_result(), results, overwrite=True, figures=False)
    assert user.read_text() == "chapter 1"


def test_figures_link_to_user_folder_is_never_written_or_emptied(tmp_path, results):
    mine = tmp_path / "my_figures"
    mine.mkdir()
    (mine / "overlay.png").write_bytes(b"\x89PNG my figure")
    (results / "figures").symlink_to(mine, target_is_directory=True)
    _plant(results, "figures/overlay.png", mine / "overlay.png")  # as if an earlier run had written it there
    with pytest.raises(TenfoldInputError, match="figures/"):
        write_results(_demo_result(), results, overwrite=True, figures=False)
    assert (mine / "overlay.png").read_bytes() == b"\x89PNG my figure"
    assert not _outdir._ours(results, "figures/overlay.png", _outdir.read_manifest(results))


def test_user_file_named_like_a_results_folder_changes_nothing(tmp_path, results):
    (results / "figures").write_text("my list of figures")
    before = _snapshot(results)
    tmp = _outdir.work_folder(results)
    for rel in ("summary.json", "provenance.json", "figures/columns_overlay.png"):
        (tmp / rel).parent.mkdir(exist_ok=True)
        (tmp / rel).write_text("new")
    with pytest.raises(TenfoldInputError, match="figures"):
        _outdir.commit(tmp, results, ["summary.json", "provenance.json", "figures/columns_overlay.png"])
    assert {k: v for k, v in _snapshot(results).items() if not k.startswith(".res.writing")} == before
    (results / "figures").unlink()  # the manifest is still right: a later --overwrite run goes through
    write_results(_demo_result(), results, overwrite=True, figures=False)


def test_failed_move_puts_everything_back(results, monkeypatch):
    before = _snapshot(results)
    real, calls = os.replace, []

    def flaky(src, dst):
        calls.append(dst)
        if len(calls) == 7:
            raise OSError(28, "No space left on device")
        return real(src, dst)

    monkeypatch.setattr(_outdir.os, "replace", flaky)
    with pytest.raises(TenfoldInputError, match="nothing was changed"):
        write_results(_demo_result(pixel_size_nm=0.03), results, overwrite=True, figures=False)
    monkeypatch.undo()
    assert _snapshot(results) == before


def test_work_folder_name_with_huge_pid_is_not_an_error(tmp_path):
    (tmp_path / f".res.writing-{10**30}-0123abcd").mkdir()
    write_results(_demo_result(), tmp_path / "res", figures=False)
    assert (tmp_path / f".res.writing-{10**30}-0123abcd").is_dir()  # a look-alike, not ours: kept


def test_unlistable_results_folder_is_a_named_error(results, monkeypatch):
    def denied(self):
        raise PermissionError(13, "Permission denied", str(self))

    monkeypatch.setattr(Path, "iterdir", denied)
    with pytest.raises(TenfoldInputError, match="cannot be listed .Permission denied"):
        _outdir.check_output_folder(results, overwrite=True)


def test_cli_refusal_names_out_not_out_dir(tmp_path, results, capsys, monkeypatch):
    monkeypatch.setattr(_outdir, "_TOP_LEVEL", ("summary.json",))
    (results / "summary.json").write_text("{}")  # edited by the user
    with pytest.raises(TenfoldInputError) as err:
        write_results(_demo_result(), results, overwrite=True, figures=False)
    from tenfold.analysis.cli import _flag_names

    assert "out_dir" in str(err.value) and "out_dir" not in _flag_names(str(err.value))
    assert "--out" in _flag_names(str(err.value))


# ---------------------------------------------------------------------------------------------------------------
# 2. signals: a SIGTERM whose exception was swallowed still stops the run, old results intact


def test_swallowed_signal_still_keeps_old_results(results):
    before = _snapshot(results)
    _stop.reset()
    _stop.record(signal.SIGTERM)
    try:
        with pytest.raises(_stop.Signalled):
            write_results(_demo_result(pixel_size_nm=0.03), results, overwrite=True, figures=False)
    finally:
        _stop.reset()
    assert _snapshot(results) == before


def test_signal_inside_a_weakref_callback_ends_like_ctrl_c(monkeypatch, capsys):
    from tenfold.analysis import cli

    class Thing:
        pass

    def analyze(args):
        t = Thing()
        weakref.finalize(t, cli._on_signal, signal.SIGTERM, None)  # the handler runs where Python swallows errors
        del t
        return 0

    monkeypatch.setattr(cli, "_analyze", analyze)
    monkeypatch.setattr(sys, "unraisablehook", sys.unraisablehook)  # restored after the test
    rc = main(["analyze", str(SAMPLES / "decagonal_haadf_low_dose.tif"), "--out", "unused"])
    err = capsys.readouterr().err
    _stop.reset()
    assert rc == 128 + signal.SIGTERM
    assert err.strip().splitlines() == [f"tenfold: interrupted (signal {int(signal.SIGTERM)}); nothing half-written is left"]


# ---------------------------------------------------------------------------------------------------------------
# 3. batch: the batch level's files are protected like a single run's; resume compares checksums


def _fake_analyse(path, folder, params, frame, frame_range, figures, overwrite, execution, align=True, nonrigid=False):
    """Stand-in for one image's analysis: a finished folder as write_results leaves it (summary, parameters)."""
    from tenfold.analysis._params_file import parameters_to_toml
    from tenfold.analysis.pipeline import Parameters

    f = Path(folder)
    if f.exists() and not overwrite:
        return {"status": "TenfoldInputError: folder exists", "seconds": 0.0}
    f.mkdir(parents=True, exist_ok=True)
    (f / "summary.json").write_text(json.dumps({"input": {"sha256": _outdir._sha256(Path(path)), "file": path},
                                                "n_columns": 3, "notes": []}))
    (f / "parameters.toml").write_text(parameters_to_toml(Parameters.from_dict(params)))
    return {"status": "ok", "seconds": 0.0}


@pytest.fixture
def fake_batch(tmp_path, monkeypatch):
    monkeypatch.setattr(batch, "_analyse_image", _fake_analyse)
    src = tmp_path / "in"
    src.mkdir()
    for name in ("a.tif", "b.tif"):
        (src / name).write_bytes(b"II*\0" + name.encode())
    return src, tmp_path / "out"


@pytest.mark.parametrize("name", ["comparison.csv", "comparison.xlsx", "figures/comparison.png"])
def test_batch_keeps_users_comparison_files(fake_batch, name):
    src, out = fake_batch
    (out / "figures").mkdir(parents=True)
    (out / name).write_bytes(b"the user's own table")
    with pytest.raises(TenfoldInputError, match=f"--out .*{name} is not Tenfold's own .* so the batch will not"):
        batch.run_batch([src], out, execution=SERIAL)
    assert (out / name).read_bytes() == b"the user's own table"
    assert not (out / "a").exists()  # refused before any image was analysed


def test_batch_comparison_folder_in_the_way_is_one_line(fake_batch, capsys):
    src, out = fake_batch
    (out / "comparison.csv").mkdir(parents=True)
    assert main(["batch", str(src), "--out", str(out), "--quiet", "--workers", "1"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "comparison.csv" in err[0] and "IsADirectoryError" not in err[0]


def test_batch_rerun_replaces_its_own_comparison_and_resumes(fake_batch):
    src, out = fake_batch
    batch.run_batch([src], out, execution=SERIAL)
    manifest = _outdir.read_manifest(out)
    assert {"comparison.csv", "comparison.xlsx"} <= set(manifest)
    (out / "notes.txt").write_text("mine")
    table = batch.run_batch([src], out, execution=SERIAL)  # resume: both images finished, the comparison is rewritten
    assert list(table["status"]) == ["ok", "ok"] and (out / "notes.txt").read_text() == "mine"


def test_batch_resume_notices_a_replaced_image(fake_batch):
    src, out = fake_batch
    batch.run_batch([src], out, execution=SERIAL)
    (src / "b.tif").write_bytes(b"II*\0 a new acquisition under the old name")
    with pytest.raises(TenfoldInputError, match="input checksum differs"):
        batch.run_batch([src], out, execution=SERIAL)


def test_batch_resume_notices_same_stem_images_in_another_order(fake_batch, tmp_path):
    src, out = fake_batch
    other = tmp_path / "day2"
    other.mkdir()
    (other / "a.tif").write_bytes(b"II*\0 another a")
    batch.run_batch([src / "a.tif", other / "a.tif"], out, execution=SERIAL)
    with pytest.raises(TenfoldInputError, match="input checksum differs"):
        batch.run_batch([other / "a.tif", src / "a.tif"], out, execution=SERIAL)


def test_batch_image_named_like_a_batch_file_gets_its_own_folder(fake_batch):
    src, out = fake_batch
    (src / "figures.tif").write_bytes(b"II*\0 figures")
    table = batch.run_batch([src], out, execution=SERIAL)
    assert "figures-2" in set(table["folder"]) and (out / "figures" / "comparison.png").is_file()


# ---------------------------------------------------------------------------------------------------------------
# 4. no hangs: FIFOs are refused before anything opens them; lengths beyond the image are named errors


@pytest.mark.parametrize("command", ["analyze", "analyze_tiled", "info", "batch"])
@pytest.mark.parametrize("link", [False, True], ids=["fifo", "link_to_fifo"])
def test_fifo_is_refused_at_once(tmp_path, capsys, command, link):
    fifo = tmp_path / "scan.tif"
    os.mkfifo(fifo)
    path = fifo
    if link:
        path = tmp_path / "alias.tif"
        path.symlink_to(fifo)
    argv = {"analyze": ["analyze", str(path), "--out", str(tmp_path / "o")],
            "analyze_tiled": ["analyze", str(path), "--out", str(tmp_path / "o"), "--tile-size", "128"],
            "info": ["info", str(path)], "batch": ["batch", str(path), "--out", str(tmp_path / "o")]}[command]
    signal.alarm(20)  # a regression would block in open(); fail instead of hanging the suite
    try:
        assert main(argv) == 2
    finally:
        signal.alarm(0)
    assert "not a regular file" in capsys.readouterr().err


@FAST
@given(st.sampled_from(["column_spacing_px", "column_diameter_px", "ring_radius_px", "tiling_edge_px",
                        "ladder_r_max_px", "d0_px", "column_spacing_nm", "ring_radius_nm"]),
       st.floats(min_value=1.0, max_value=1e300))
def test_lengths_beyond_the_image_are_named(name, value):
    shape, ps = (300, 500), 0.02
    px = value / ps if name.endswith("_nm") else value
    limit = np.hypot(*shape) if name.startswith(("ladder", "d0")) else max(shape)
    if px > limit:
        with pytest.raises(TenfoldInputError, match=f"{name}=.* larger than the image"):
            check_lengths({name: value}, shape, ps)
    else:
        check_lengths({name: value}, shape, ps)


def test_cli_column_spacing_beyond_the_image(tmp_path, capsys, counts):
    tifffile.imwrite(tmp_path / "s.tif", counts)
    for spacing in ("1e6px", "1e300px"):
        assert main(["analyze", str(tmp_path / "s.tif"), "--out", str(tmp_path / "o"), "--column-spacing",
                     spacing, "--quiet"]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and "--column-spacing" in err[0] and "larger than the image" in err[0]


@FAST
@given(st.integers(1, 100_000), st.integers(1, 10_000))
def test_workers_capped_at_cores_and_tasks(workers, tasks):
    used, note = cap_workers(workers, tasks=tasks)
    assert 1 <= used <= max(1, min(usable_cores(), tasks)) and used <= workers
    assert (used < workers) == bool(note)
    if note:
        assert f"--workers {workers}" in note


# ---------------------------------------------------------------------------------------------------------------
# 5. precision: the float32 cast never eats the signal


@FAST
@given(st.sampled_from([np.int32, np.uint32, np.int64, np.uint64, np.float64]),
       st.sampled_from([2e9, 4.2e9, 1e12, 5e15, -2e9]))
def test_large_constant_offset_keeps_the_signal(counts, dtype, offset):
    if np.dtype(dtype).kind in "iu":  # the offset image must fit the dtype
        assume(np.iinfo(dtype).min <= offset and offset + 60 <= np.iinfo(dtype).max)
    arr = (counts.astype(np.float64) + offset).astype(dtype)
    with pytest.warns(TenfoldWarning, match="constant offset"):
        mg = micrograph_from_array(arr)
    # the offset is subtracted exactly: the counts come back up to a constant
    diff = mg.data.astype(np.float64) - counts
    assert np.ptp(diff) == 0


@FAST
@given(st.sampled_from([np.float64, np.float32]), st.integers(-310, -17))
def test_tiny_values_are_not_constant(counts, dtype, exponent):
    arr = (counts.astype(np.float64) * 10.0 ** exponent).astype(dtype)
    assume(np.unique(arr).size >= 8)  # else nothing is left in the dtype itself (below its smallest subnormal)
    with pytest.warns(TenfoldWarning, match="too small for the float32 precision"):
        mg = micrograph_from_array(arr)
    assert np.unique(mg.data).size == np.unique(arr).size  # every distinct level survives
    assert np.corrcoef(mg.data.ravel(), counts.ravel())[0, 1] > 0.99


def test_one_wild_pixel_is_masked_not_scaled(counts):
    arr = counts.astype(np.float32)
    arr[5, 7] = 1e38
    with pytest.warns(TenfoldWarning, match="1 pixel with values beyond"):
        mg = micrograph_from_array(arr)
    assert not mg.valid[5, 7] and mg.valid.sum() == arr.size - 1
    keep = mg.valid
    assert np.array_equal(mg.data[keep], counts.astype(np.float32)[keep])


def test_offset_image_finds_the_same_columns(counts):
    from tenfold.analysis.columns import find_columns

    plain, _ = find_columns(counts.astype(np.float32))
    data, ok, notes = to_float32(counts.astype(np.uint32) + np.uint32(2_000_000_000))
    shifted, _ = find_columns(data, valid=ok)
    assert notes and len(plain) > 20 and len(shifted) == len(plain)


def test_plan_on_a_sample_matches_the_whole_image(counts):
    """The tiled path decides once from a strided sample; every tile then gets the same offset."""
    arr = counts.astype(np.float64) + 2e9
    plan = float32_plan(arr[::4, ::4], arr.dtype)
    a, _ = plan.apply(arr[:64])
    b, _ = plan.apply(arr[64:])
    assert plan.offset == 2e9  # the robust minimum: the sample's lowest counts are 0
    assert np.array_equal(np.vstack([a, b]), counts.astype(np.float32))


# ---------------------------------------------------------------------------------------------------------------
# 6. honest zeros: the damaged-file note fires only beyond Poisson statistics


@FAST
@given(st.floats(0.05, 3.0), st.integers(0, 2**16))
def test_low_count_images_get_no_zero_note(level, seed):
    img = np.random.default_rng(seed).poisson(level, (96, 96)).astype(np.float32)
    assume(np.ptp(img) > 0)
    try:
        _, notes = mask_flat(img, np.ones(img.shape, bool))
    except TenfoldInputError:
        return  # flat almost everywhere (a level so low that nearly every pixel is 0): its own error
    assert not any("exactly 0" in n for n in notes)


@FAST
@given(st.floats(8.0, 200.0), st.floats(0.3, 0.7), st.integers(0, 2**16))
def test_dropped_pixels_at_high_counts_get_the_note(level, share, seed):
    rng = np.random.default_rng(seed)
    img = rng.poisson(level, (96, 96)).astype(np.float32)
    img[rng.random(img.shape) < share] = 0
    _, notes = mask_flat(img, np.ones(img.shape, bool))
    assert any("exactly 0" in n and "counting statistics" in n for n in notes)


def test_poisson_expectation_matches_the_formula():
    # a uniform level lambda: P(0) = exp(-lambda) per pixel (Poisson distribution)
    img = np.full((64, 64), 2.0, np.float32)
    assert poisson_zeros(img, np.ones(img.shape, bool)) == pytest.approx(64 * 64 * np.exp(-2.0), rel=1e-5)
    assert poisson_zeros(img - 0.5, np.ones(img.shape, bool)) == 0.0  # not whole-number counts


# ---------------------------------------------------------------------------------------------------------------
# 7. good files read as what they are; broken ones named as such; library logs kept off the terminal


def test_grey_alpha_png_is_one_image(tmp_path, counts):
    from PIL import Image

    la = np.stack([np.clip(counts * 4, 0, 255).astype(np.uint8), np.full(counts.shape, 255, np.uint8)], -1)
    Image.fromarray(la, mode="LA").save(tmp_path / "la.png")
    mg = read_micrograph(tmp_path / "la.png")
    assert mg.data.shape == counts.shape and any("alpha" in n for n in mg.meta.notes)


def test_bad_ome_pixel_size_is_ignored_with_a_note(tmp_path, counts):
    tifffile.imwrite(tmp_path / "a.ome.tif", counts, ome=True, metadata={"PhysicalSizeX": 0.02, "PhysicalSizeY": 0.02})
    raw = (tmp_path / "a.ome.tif").read_bytes().replace(b'PhysicalSizeX="0.02"', b'PhysicalSizeX="zz.z"')
    (tmp_path / "b.ome.tif").write_bytes(raw)
    with pytest.warns(TenfoldWarning, match="calibration cannot be read"):
        mg = read_micrograph(tmp_path / "b.ome.tif")
    assert mg.meta.pixel_size_nm is None and np.array_equal(mg.data, counts.astype(np.float32))


def test_corrupt_mrc_frame_count_is_a_corrupt_header(tmp_path, counts):
    import mrcfile

    with mrcfile.new(tmp_path / "a.mrc") as m:
        m.set_data(counts.astype(np.float32))
    raw = bytearray((tmp_path / "a.mrc").read_bytes())
    raw[8:12] = np.int32(1_000_000).tobytes()  # NZ, the third word of the MRC2014 header
    (tmp_path / "b.mrc").write_bytes(bytes(raw))
    with pytest.raises(TenfoldInputError, match="corrupt MRC header") as err:
        read_micrograph(tmp_path / "b.mrc")
    assert "GB" not in str(err.value)


def test_tifffile_log_lines_stay_off_the_terminal(tmp_path, capsys, counts):
    tifffile.imwrite(tmp_path / "a.tif", counts, resolution=(50.0, 50.0), resolutionunit="CENTIMETER")
    raw = bytearray((tmp_path / "a.tif").read_bytes())
    with tifffile.TiffFile(tmp_path / "a.tif") as tf:
        offset = tf.pages[0].tags["ResolutionUnit"].valueoffset
    raw[offset:offset + 2] = np.uint16(1025).tobytes()  # no such unit: tifffile logs an error for the tag
    (tmp_path / "b.tif").write_bytes(bytes(raw))
    main(["analyze", str(tmp_path / "b.tif"), "--out", str(tmp_path / "o"), "--quiet", "--column-spacing", "1e6px"])
    err = capsys.readouterr().err.strip().splitlines()
    assert err and all(line.startswith(("tenfold:", "note:", "warning:")) for line in err), err


def test_results_folder_that_cannot_be_checked_is_a_named_error(tmp_path, monkeypatch):
    def denied(self, **kwargs):
        raise PermissionError(13, "Permission denied", str(self))

    monkeypatch.setattr(Path, "stat", denied)
    with pytest.raises(TenfoldInputError, match=r"--out .*res: cannot be checked \(Permission denied"):
        _outdir.check_output_folder(tmp_path / "res", overwrite=False, flag="--out")


def test_file_system_errors_are_one_named_line(tmp_path, capsys, monkeypatch):
    from tenfold.analysis import cli

    def fails(args):
        raise IsADirectoryError(21, "Is a directory", str(tmp_path / "comparison.csv"))

    monkeypatch.setattr(cli, "_info", fails)
    assert main(["info", "x.tif"]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "comparison.csv: Is a directory" in err[0]


@pytest.mark.parametrize("message, expected", [
    ("out_dir /data/res: results folder exists", "--out /data/res: results folder exists"),
    ("/data/out_dir/frame.tif: is a directory", "/data/out_dir/frame.tif: is a directory"),
    ("frame=3 out of range", "--frame=3 out of range"),
    ("scan distortion in the corrected frame", "scan distortion in the corrected frame"),
    ("a single 2-D image; drop frame/frame_range", "a single 2-D image; drop --frame/--frames"),
    ("/data/frame_range: no such file", "/data/frame_range: no such file"),
], ids=["option", "path_kept", "frame", "frame_as_a_word", "alternatives", "path_end"])
def test_option_names_replace_parameters_not_paths(message, expected):
    from tenfold.analysis.cli import _flag_names

    assert _flag_names(message) == expected


def test_public_pipeline_refuses_lengths_beyond_the_image():
    # the API, not only the command line, names a length larger than the image instead of hanging in the scale stage
    from tenfold.analysis.io import micrograph_from_array
    from tenfold.analysis.pipeline import Parameters, run_pipeline

    mg = micrograph_from_array(np.random.default_rng(0).poisson(20, (64, 64)).astype(np.float32))
    with pytest.raises(TenfoldInputError, match="column_spacing_px=1e\\+06 px is larger than the image"):
        run_pipeline(mg, Parameters(column_spacing_px=1e6))
