"""The per-stage clock behind summary['timings_s']: bookkeeping only (speed figures live in benchmarks/)."""

from __future__ import annotations

import pytest

from tenfold.analysis import _timing


def test_laps_add_up_and_keep_order(monkeypatch):
    ticks = iter([10.0, 10.5, 12.0, 12.25])  # a fake monotonic clock: laps of 0.5, 1.5 and 0.25 s
    monkeypatch.setattr(_timing.time, "perf_counter", lambda: next(ticks))
    clock = _timing.start()
    _timing.lap("columns")
    _timing.lap("motifs")
    _timing.lap("columns")  # a name seen twice adds up
    _timing.stop(clock)
    _timing.lap("ignored")  # no current clock: nothing is booked
    assert clock.as_dict() == {"columns": 0.75, "motifs": 1.5, "total": 2.25}


def test_with_stage_first_and_last():
    t = _timing.with_stage({"columns": 1.0, "total": 1.0}, "read", 0.5, first=True)
    assert list(t) == ["read", "columns", "total"] and t["total"] == pytest.approx(1.5)
    t = _timing.with_stage(t, "export", 2.0)
    assert list(t) == ["read", "columns", "export", "total"] and t["total"] == pytest.approx(3.5)
    assert "export" in _timing.format_table(t)


def test_pipeline_writes_timings():
    import numpy as np

    from tenfold.analysis.io import micrograph_from_array
    from tenfold.analysis.pipeline import Parameters, run_pipeline

    rng = np.random.default_rng(0)
    yy, xx = np.mgrid[0:128, 0:128]
    lam = np.full((128, 128), 20.0)
    for y in range(8, 120, 10):  # a grid of Gaussian columns with Poisson noise
        for x in range(8, 120, 10):
            lam += 400.0 * np.exp(-((xx - x) ** 2 + (yy - y) ** 2) / (2 * 1.5 ** 2))
    img = rng.poisson(lam).astype(np.float32)
    res = run_pipeline(micrograph_from_array(img, pixel_size_nm=0.05), Parameters(fourier=False, phason=False))
    t = res.summary["timings_s"]
    assert {"columns", "motifs", "ladder", "tiling", "total"} <= set(t)
    assert "fourier" not in t and "phason" not in t  # stages that did not run are not listed
    assert t["total"] == pytest.approx(sum(v for k, v in t.items() if k != "total"), abs=0.005)
