"""Scan distortion seen in the power spectrum: a sheared decagonal image against an undistorted one.

Run:  python docs/examples/scan_distortion.py [OUTDIR]
Writes OUTDIR/scan_distortion.png: the log power spectra of the bundled undistorted and 3 %-sheared samples with
the detected spots, and prints the fitted axis ratio of the spot shells (1 for an undistorted ten-fold pattern;
about 1 + shear for a fast-scan shear).
"""

import sys
from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

from tenfold.analysis.fourier import analyze_fourier, power_spectrum
from tenfold.analysis.io import read_micrograph

here = Path(__file__).resolve().parents[2]
out = Path(sys.argv[1]) if len(sys.argv) > 1 else here / "docs" / "images"
out.mkdir(parents=True, exist_ok=True)

fig = Figure(figsize=(10, 5), layout="constrained")
for ax, name in zip(fig.subplots(1, 2), ("decagonal_haadf_vacancies", "decagonal_haadf_sheared")):
    mg = read_micrograph(here / "sample_images" / f"{name}.tif")
    spec, dk = power_spectrum(mg.data, valid=mg.valid)
    spots, info = analyze_fourier(mg.data, valid=mg.valid, pixel_size_nm=mg.meta.pixel_size_nm)
    k_nm = dk / mg.meta.pixel_size_nm
    n = spec.shape[0]
    ext = np.array([-n / 2, n / 2, n / 2, -n / 2]) * k_nm
    ax.imshow(spec, cmap="gray", extent=ext, vmax=np.percentile(spec, 99.8))
    ax.scatter(spots["kx_per_px"] / mg.meta.pixel_size_nm, spots["ky_per_px"] / mg.meta.pixel_size_nm, s=40,
               facecolors="none", edgecolors="#e69f00", linewidths=0.8)
    lim = 1.2 * np.percentile(spots["k_per_nm"], 90)
    ax.set(xlim=(-lim, lim), ylim=(lim, -lim), xlabel="k_x (1/nm)", ylabel="k_y (1/nm)")
    d = info["distortion"]
    ax.set_title(f"{name}\norder {info['rotational_order']}, shell axis ratio {d['axis_ratio']:.4f}")
    print(name, "rotational order", info["rotational_order"], "axis ratio", round(d["axis_ratio"], 4),
          "warning" if d["warning"] else "ok")
fig.savefig(out / "scan_distortion.png", dpi=130)
print("wrote", out / "scan_distortion.png")
