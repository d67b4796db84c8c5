"""GUI responsiveness of the Tenfold napari dock.

1. Time from pressing Run to the result layers shown, for a 1024 x 1024 px region of a 4096 x 4096 image
   (target < 2 s).
2. The GUI thread's longest stall during a full 4096 x 4096 run (target < 100 ms), measured with a 10 ms QTimer
   heartbeat recording the largest gap between ticks.

Run: ``xvfb-run -a python benchmarks/bench_gui.py`` ; prints the figures.
"""

from __future__ import annotations

import os
import sys
import time

os.environ.setdefault("QT_API", "pyside6")

import numpy as np  # noqa: E402

PX_NM = 0.04  # the bundled samples' pixel size
SIZE = 4096


def _image() -> np.ndarray:
    from tenfold.analysis.synthetic import decagonal_model, make_sample

    model = decagonal_model(width_nm=SIZE * PX_NM, height_nm=SIZE * PX_NM, angle_deg=7.0, rng=101)
    image, _ = make_sample(model, pixel_size_nm=PX_NM, sigma_nm=0.06, counts_by_species=(1118.0, 3090.0, 8000.0),
                           background=40.0, rng=1101, shape=(SIZE, SIZE))
    return image


class _Heartbeat:
    """10 ms QTimer; ``max_gap_ms`` is the longest time between two ticks (GUI-thread stall + 10 ms)."""

    def __init__(self, label=lambda: "") -> None:
        from qtpy.QtCore import QTimer

        self.label = label
        self.stalls: list[tuple[float, str]] = []
        self.timer = QTimer()
        self.timer.setInterval(10)
        self.timer.timeout.connect(self._tick)
        self.last = None
        self.max_gap_ms = 0.0

    def _tick(self) -> None:
        now = time.perf_counter()
        if self.last is not None:
            gap = 1000 * (now - self.last)
            self.max_gap_ms = max(self.max_gap_ms, gap)
            if gap > 100:
                self.stalls.append((round(gap), self.label()))
        self.last = now

    def start(self) -> None:
        self.last, self.max_gap_ms, self.stalls = None, 0.0, []
        self.timer.start()

    def stop(self) -> float:
        self.timer.stop()
        return self.max_gap_ms


def _wait(app, widget) -> None:
    while widget.worker is not None:
        app.processEvents()
        time.sleep(0.002)
    app.processEvents()


def main() -> None:
    import napari
    from qtpy.QtWidgets import QApplication

    from tenfold.analysis.io import micrograph_from_array
    from tenfold.analysis.refine import warm_up
    from tenfold.napari_plugin._layers import image_layer_tuple
    from tenfold.napari_plugin._widget import PipelineWidget

    t = time.perf_counter()
    image = _image()
    print(f"rendered {SIZE} x {SIZE} synthetic decagonal image in {time.perf_counter() - t:.1f} s")
    warm_up()
    viewer = napari.Viewer(show=True)
    app = QApplication.instance()
    data, kwargs, _ = image_layer_tuple(micrograph_from_array(image, pixel_size_nm=PX_NM, name="bench"), "bench")
    layer = viewer.add_image(data, **kwargs)
    widget = PipelineWidget(viewer)
    viewer.window.add_dock_widget(widget)
    heart = _Heartbeat(lambda: widget.status.text())
    inserted: list[tuple[str, float]] = []
    put = widget._put_layer

    def timed_put(new):
        t0 = time.perf_counter()
        put(new)
        inserted.append((new.name, round(1000 * (time.perf_counter() - t0))))

    widget._put_layer = timed_put

    # 1. a 1024 x 1024 px region; the first run pays one-off costs (numba caches, napari triangulation)
    r0 = c0 = (SIZE - 1024) // 2
    box = np.array([[r0, c0], [r0, c0 + 1024], [r0 + 1024, c0 + 1024], [r0 + 1024, c0]], float) * PX_NM
    viewer.add_shapes([box], shape_type="rectangle", name="regions", units=("nm", "nm"))
    widget.regions_combo.setCurrentText("regions")
    times = []
    for _ in range(3):
        t = time.perf_counter()
        widget.run()
        _wait(app, widget)
        times.append(time.perf_counter() - t)
    print(flush=True)
    print(f"1024 x 1024 region: run pressed -> layers shown {times[0]:.2f} s first, "
          f"{min(times[1:]):.2f} s best of later runs (target < 2 s); {widget.status.text()}")

    # 2. the whole 4096 x 4096 image, heartbeat running
    widget.regions_combo.setCurrentText("(whole image)")
    heart.start()
    t = time.perf_counter()
    widget.run()
    _wait(app, widget)
    total = time.perf_counter() - t
    gap = heart.stop()
    print(f"4096 x 4096 full run: {total:.1f} s, longest GUI-thread gap {gap:.0f} ms "
          f"(10 ms heartbeat; target < 100 ms); {widget.status.text()}")
    print("stalls over 100 ms (ms, status shown then):", heart.stalls)
    print("GUI-thread layer insertions of the full run (name, ms):", inserted[-4:])
    del layer


if __name__ == "__main__":
    main()
    # skip interpreter teardown of the Qt/vispy objects (a crash there would hide the printed figures' rc)
    sys.stdout.flush()
    os._exit(0)
