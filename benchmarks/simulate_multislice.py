"""Multislice HAADF-STEM simulation of a crowded decagonal-approximant-like cell, cached as a one-cell Fourier series.

The structure is our own design (built with ASE, :func:`build_structure`): a centred rectangular cell
(a = b = 2.0 nm, c = 0.4 nm along the beam) holding two clusters, at (0, 0) and (a/2, b/2). Each cluster is

* a centre column of Co (two Co atoms per 0.4 nm repeat),
* a pentagon of five mixed columns at 0.25 nm (Al at z = 0, Co at z = c/2), rotated 18 deg against the ring,
* a ring of ten Al columns at 0.48 nm (spacing 0.297 nm; 0.254 nm to the nearest pentagon column),

plus two Al "glue" columns at (a/2, 0) and (0, b/2): 34 columns per cell, three species
(0 = Al, 1 = Al/Co, 2 = Co). The slab is ``--repeats`` cells thick along the beam.

abTEM (a general-purpose multislice library, PyPI ``abtem``) simulates the HAADF image of one cell on a periodic
scan grid (``--scan-gpts`` points per cell edge, endpoint excluded, so the samples are exactly one period): PRISM
with interpolation factor 1 (exact: every plane wave inside the probe aperture), Lobato parametrisation, infinite
projection. The frozen-phonon run averages ``--configs`` configurations with isotropic Gaussian displacements
(rms per axis ``--sigma-al``, ``--sigma-co`` in Angstrom; about 0.10 and 0.075 A at room temperature, from memory of
Debye-Waller factors, B = 8 pi^2 u^2 ~ 0.8 and 0.45 A^2).

The image of a periodic specimen is a Fourier series over the reciprocal lattice of the cell; an incoherent HAADF
image is band-limited to 2 alpha / lambda (twice the probe aperture), so the coefficients of the sampled cell
(``numpy.fft.fft2`` / N^2) up to that cut-off are the whole image when the scan step is below
lambda / (4 alpha). They are written to ``benchmarks/data/multislice_decagonal.npz`` (see
``tenfold.analysis.synthetic.load_multislice_cell`` for the keys) with the truth (projected atom positions; cluster
centre as an offset from the column; mean frozen-phonon displacement per column) and the
parameters. ``tenfold.analysis.synthetic.multislice_sample`` tiles it to any image size and pixel size and adds
Poisson noise.

Needs abTEM and ASE (``pip install abtem ase``; not Tenfold dependencies: the cached .npz is all the stress matrix
and the tests read). Run (about 3 min per configuration on 2 cores)::

    python benchmarks/simulate_multislice.py                    # both runs, writes the .npz
    python benchmarks/simulate_multislice.py --configs 3 --repeats 5

References
----------
J. Madsen, T. Susi, Open Research Europe 1 (2021) 24 (abTEM).
C. Ophus, Advanced Structural and Chemical Imaging 3 (2017) 13 (PRISM).
E. J. Kirkland, Advanced Computing in Electron Microscopy, 2nd ed. (Springer 2010) (multislice, frozen phonons).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from pathlib import Path

import numpy as np

OUT = Path(__file__).resolve().parent / "data" / "multislice_decagonal.npz"
CELL_NM = (2.0, 2.0, 0.4)
PENTAGON_R_NM, RING_R_NM = 0.25, 0.48
SPECIES = ("Al", "AlCo", "Co")


def structure_columns() -> list[dict]:
    """The columns of one cell: position (nm), species index, role, cluster centre, and the atoms along the beam."""
    a, b, _ = CELL_NM
    cols = []
    for cx, cy in ((0.0, 0.0), (a / 2, b / 2)):
        cols.append(dict(x=cx, y=cy, species=2, role="centre", cx=cx, cy=cy, atoms=("Co", "Co")))
        for k in range(5):
            t = math.radians(18.0 + 72.0 * k)
            cols.append(dict(x=cx + PENTAGON_R_NM * math.cos(t), y=cy + PENTAGON_R_NM * math.sin(t), species=1,
                             role="ring", cx=cx, cy=cy, atoms=("Al", "Co")))
        for k in range(10):
            t = math.radians(36.0 * k)
            cols.append(dict(x=cx + RING_R_NM * math.cos(t), y=cy + RING_R_NM * math.sin(t), species=0,
                             role="ring", cx=cx, cy=cy, atoms=("Al", "Al")))
    for x, y in ((a / 2, 0.0), (0.0, b / 2)):
        cols.append(dict(x=x, y=y, species=0, role="glue", cx=math.nan, cy=math.nan, atoms=("Al", "Al")))
    return cols


def build_structure(repeats: int):
    """ase.Atoms of the slab (Angstrom), periodic in x, y and along the beam (z), ``repeats`` cells thick."""
    import ase

    a, b, c = (10.0 * v for v in CELL_NM)
    sym, pos = [], []
    for col in structure_columns():
        for layer, el in enumerate(col["atoms"]):
            sym.append(el)
            pos.append(((10.0 * col["x"]) % a, (10.0 * col["y"]) % b, layer * c / 2))
    return ase.Atoms(sym, positions=pos, cell=[a, b, c], pbc=True) * (1, 1, repeats)


def simulate(atoms, *, energy_ev, alpha_mrad, inner_mrad, outer_mrad, scan_gpts, potential_gpts, configs,
             sigmas_a, seed):
    """HAADF image of one cell, (scan_gpts, scan_gpts) float array indexed [row = y, col = x]."""
    import abtem

    abtem.config.set({"device": "cpu", "fft": "fftw"})
    a, b = atoms.cell[0, 0], atoms.cell[1, 1]
    if configs > 0:
        specimen = abtem.FrozenPhonons(atoms, num_configs=configs, sigmas=sigmas_a, seed=seed)
    else:
        specimen = atoms
    pot = abtem.Potential(specimen, gpts=(potential_gpts, potential_gpts), slice_thickness=2.0,
                          projection="infinite", parametrization="lobato")
    smat = abtem.SMatrix(potential=pot, energy=energy_ev, semiangle_cutoff=alpha_mrad, interpolation=1)
    det = abtem.AnnularDetector(inner=inner_mrad, outer=outer_mrad)
    scan = abtem.GridScan(start=(0, 0), end=(a, b), gpts=(scan_gpts, scan_gpts), endpoint=False)
    m = smat.scan(scan=scan, detectors=det).compute(progress_bar=False)
    arr = np.asarray(m.array, dtype=float)
    if arr.ndim == 3:  # frozen-phonon ensemble not reduced by the library
        arr = arr.mean(axis=0)
    return arr.T  # abTEM indexes (x, y); images are (row = y, col = x)


def phonon_column_shifts(atoms, *, configs, sigmas_a, seed, n_columns) -> np.ndarray:
    """Mean displacement (nm, (n_columns, 2)) of each column's atoms over the frozen-phonon configurations.

    With a few configurations the ensemble is finite: each column's atoms sit on average a few pm off the lattice
    site, and the averaged image follows them, so the truth of the phonon run is the mean displaced position.
    The configurations are abTEM's own (same seed), drawn again without simulating.
    """
    import abtem

    ens = abtem.FrozenPhonons(atoms, num_configs=configs, sigmas=sigmas_a, seed=seed).to_atoms_ensemble()
    ref = atoms.positions[:, :2]
    cell = np.diag(atoms.cell)[:2]
    col = (np.arange(len(atoms)) % (2 * n_columns)) // 2  # atoms are listed column by column, two layers each
    shift = np.zeros((n_columns, 2))
    for conf in ens.trajectory:  # a few configurations
        d = conf.positions[:, :2] - ref
        d -= cell * np.round(d / cell)  # minimum image
        shift += np.stack([np.bincount(col, weights=d[:, i], minlength=n_columns) for i in (0, 1)], axis=1)
    count = np.bincount(col, minlength=n_columns) * len(ens.trajectory)
    return shift / count[:, None] / 10.0


def wavelength_nm(energy_ev: float) -> float:
    """Relativistic electron wavelength (nm): h / sqrt(2 m0 e E (1 + e E / 2 m0 c^2)), CODATA constants."""
    h, m0, e, c = 6.62607015e-34, 9.1093837015e-31, 1.602176634e-19, 299792458.0
    return h / math.sqrt(2 * m0 * e * energy_ev * (1 + e * energy_ev / (2 * m0 * c**2))) * 1e9


def fourier_series(img: np.ndarray, cutoff_nm_inv: float) -> tuple[np.ndarray, np.ndarray]:
    """Coefficients c[h, k] (h along y, k along x, index ``h + H``) of one sampled cell with |g| <= cutoff."""
    n = img.shape[0]
    coef = np.fft.fftshift(np.fft.fft2(img)) / img.size
    half = n // 2
    h = np.arange(-half, n - half)
    gy = h[:, None] / CELL_NM[1]
    gx = h[None, :] / CELL_NM[0]
    keep = np.hypot(gx, gy) <= cutoff_nm_inv
    coef[~keep] = 0.0
    # drop the edge row / column (Nyquist, not a symmetric pair) so the series is real and symmetric in index
    coef = coef[1:, 1:]
    return coef.astype(np.complex64), np.arange(-(half - 1), half - 1 + 1)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--out", type=Path, default=OUT)
    p.add_argument("--energy-kev", type=float, default=200.0)
    p.add_argument("--alpha-mrad", type=float, default=20.0, help="probe convergence semi-angle")
    p.add_argument("--inner-mrad", type=float, default=70.0)
    p.add_argument("--outer-mrad", type=float, default=160.0)
    p.add_argument("--scan-gpts", type=int, default=64, help="scan points per cell edge (step 2.0 nm / N)")
    p.add_argument("--potential-gpts", type=int, default=400, help="potential grid per cell edge")
    p.add_argument("--repeats", type=int, default=5, help="cells along the beam (thickness = 0.4 nm x N)")
    p.add_argument("--configs", type=int, default=3, help="frozen-phonon configurations (0: skip that run)")
    p.add_argument("--sigma-al", type=float, default=0.10, help="rms displacement of Al per axis, Angstrom")
    p.add_argument("--sigma-co", type=float, default=0.075, help="rms displacement of Co per axis, Angstrom")
    p.add_argument("--seed", type=int, default=16)
    p.add_argument("--truth-only", action="store_true",
                   help="keep the coefficients of an existing --out file; recompute the truth and parameters")
    args = p.parse_args(argv)

    lam = wavelength_nm(args.energy_kev * 1e3)
    cutoff = 2 * args.alpha_mrad * 1e-3 / lam
    step = CELL_NM[0] / args.scan_gpts
    if step > 1 / (2 * cutoff):
        print(f"warning: scan step {step:.4f} nm undersamples the band limit {cutoff:.2f} /nm", file=sys.stderr)
    atoms = build_structure(args.repeats)
    common = dict(energy_ev=args.energy_kev * 1e3, alpha_mrad=args.alpha_mrad, inner_mrad=args.inner_mrad,
                  outer_mrad=args.outer_mrad, scan_gpts=args.scan_gpts, potential_gpts=args.potential_gpts,
                  sigmas_a={"Al": args.sigma_al, "Co": args.sigma_co}, seed=args.seed)
    series = {}
    if args.truth_only:
        with np.load(args.out) as z:
            series = {k[5:]: z[k] for k in z.files if k.startswith("coef_")}
            idx = z["index"]
    for label, configs in (("static", 0), ("phonon", args.configs)):
        if (label == "phonon" and configs == 0) or args.truth_only:
            continue
        t = time.perf_counter()
        img = simulate(atoms, configs=configs, **common)
        coef, idx = fourier_series(img, cutoff)
        back = np.real(np.fft.ifft2(np.fft.ifftshift(np.pad(coef, ((1, 0), (1, 0)))))) * img.size
        print(f"{label}: {time.perf_counter() - t:.0f} s, image {img.min():.3g}..{img.max():.3g}, "
              f"mean {img.mean():.3g}; series reproduces the samples to {np.abs(back - img).max() / img.max():.1e} "
              f"of the peak", flush=True)
        series[label] = coef
    cols = structure_columns()
    extra = {}
    if "phonon" in series:
        shift = phonon_column_shifts(atoms, configs=args.configs, sigmas_a=common["sigmas_a"], seed=args.seed,
                                     n_columns=len(cols))
        extra = {"phonon_dx_nm": shift[:, 0], "phonon_dy_nm": shift[:, 1]}
    params = dict(vars(args), out=str(args.out), wavelength_nm=lam, band_limit_nm_inv=cutoff, scan_step_nm=step,
                  cell_nm=CELL_NM, thickness_nm=CELL_NM[2] * args.repeats, species=SPECIES,
                  units="fraction of the incident probe intensity on the detector",
                  method="abTEM PRISM interpolation 1, Lobato, infinite projection, slice 0.2 nm",
                  abtem_version=__import__("abtem").__version__, ase_version=__import__("ase").__version__)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    np.savez_compressed(
        args.out, index=idx, cell_nm=np.array(CELL_NM[:2]), params=json.dumps(params, default=str),
        x_nm=np.array([c["x"] % CELL_NM[0] for c in cols]), y_nm=np.array([c["y"] % CELL_NM[1] for c in cols]),
        centre_dx_nm=np.array([c["cx"] - c["x"] for c in cols]),
        centre_dy_nm=np.array([c["cy"] - c["y"] for c in cols]),
        species=np.array([c["species"] for c in cols]), role=np.array([c["role"] for c in cols]),
        **extra, **{f"coef_{k}": v for k, v in series.items()})
    print(f"wrote {args.out} ({args.out.stat().st_size / 1024:.0f} kB)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
