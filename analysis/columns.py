"""Atomic-column finding: automatic scale, trackpy detection, Gaussian refinement, significance cut, species.

Steps (every automatic choice is recorded in the returned info dict):

1. Scale: ``estimate_scale`` (autocorrelation) unless spacing / diameter are given in nm.
2. Polarity: dark-column images are inverted; a skewness check of the high-passed image warns when the
   ``dark_columns`` option looks wrong (bright, sparse columns give a positive skew).
3. Optional flattening (uneven illumination): a Gaussian blur of 3 x spacing is subtracted from the image used
   for *detection* only; the refinement fits a local background per column on the unflattened image.
4. Detection: ``trackpy.locate`` on a uint16-scaled copy (trackpy rescales float images to 8 bit), diameter =
   smallest odd integer >= 4.5 sigma, separation = 0.5 x spacing, percentile 0, one centroid step (its
   centroids are pixel-locked; the Gaussian refinement removes that).
5. Refinement of every candidate at once (``refine.refine_columns``), Poisson-weighted when the image holds
   counts (non-negative integers), with one neighbour-subtracted pass.
6. Significance: noise maxima give fits with a small amplitude-to-error ratio and a width off the common one.
   Fits with sigma outside [0.5, 2] x the median go; the cut is the valley of the histogram of
   log10(A / sigma_A) over the remaining fits, searched within [2, 5] (common practice: detections below 2 sigma are
   noise, above 5 sigma real). ``min_mass`` (trackpy mass units) can be given instead or in addition.
7. Duplicates (two candidates converging on one column, closer than max(1, sigma) px) keep the more significant.
8. Mask and regions: columns with a masked pixel within 2 sigma + 0.5 px of their centre are dropped; with
   regions only columns inside a region are kept (labels from ``region.label_points``).
9. Species by ``species.classify_species``.
"""

from __future__ import annotations

import math
import time
import warnings

import numpy as np
import pandas as pd
from scipy import ndimage
from scipy.spatial import cKDTree

from . import _schema
from ._errors import TenfoldInputError, TenfoldWarning
from ._progress import report, sub_progress
from .refine import matched_significance, refine_columns, significance_with_neighbours, warm_up
from .region import label_points
from .scale import estimate_scale
from .species import classify_species

__all__ = ["find_columns", "polarity_skewness", "false_alarm_threshold", "pixel_noise_sd", "FALSE_ALARMS",
           "PRESCREEN_Z"]

#: Expected number of noise maxima per image that pass the significance threshold (see false_alarm_threshold).
FALSE_ALARMS = 0.05
#: Pre-screen before refinement (free local background, neighbours not yet modelled, so a dim column next to a
#: bright one scores well below its final significance): only candidates with no excess at all are dropped.
PRESCREEN_Z = 1.0


def polarity_skewness(image, valid=None, *, spacing_px: float) -> float:
    """Skewness of the image after removing structure coarser than ~2 column spacings.

    Bright sparse columns on a dark background give a positive value, dark columns a negative one.
    """
    img = np.asarray(image, dtype=np.float64)
    hp = img - ndimage.gaussian_filter(img, 2.0 * spacing_px)
    v = hp[valid] if valid is not None else hp.ravel()
    v = v - v.mean()
    sd = v.std()
    return float(np.mean(v**3) / sd**3) if sd > 0 else 0.0


def _locate(smooth, valid, diameter, separation, min_mass):
    """trackpy.locate on the already Gaussian-filtered image (``preprocess=False``: no second band-pass)."""
    import trackpy as tp

    lo, hi = float(smooth[valid].min()), float(smooth[valid].max())
    if not hi > lo:
        return np.zeros(0), np.zeros(0), np.zeros(0), 0
    scaled = np.where(valid, (smooth - lo) * (60000.0 / (hi - lo)), 0.0).astype(np.uint16)
    with warnings.catch_warnings():
        # trackpy warns about tiny images (3 or 4 px), no survivors and max_iterations=1 (the intended
        # setting), and uses pandas' deprecated inplace keyword: none of it is actionable for the user
        warnings.simplefilter("ignore")
        f = tp.locate(scaled, diameter, separation=separation, percentile=0, characterize=False, engine="numba",
                      max_iterations=1, minmass=0, preprocess=False)
    mass = f["mass"].to_numpy() * (hi - lo) / 60000.0 if len(f) else np.zeros(0)
    keep = mass > (min_mass or 0.0)
    return f["x"].to_numpy()[keep], f["y"].to_numpy()[keep], mass[keep], int(len(f))


def false_alarm_threshold(area_px: float, sigma_px: float, expected_false: float = FALSE_ALARMS) -> float:
    """Significance threshold (in standard deviations) for ``expected_false`` noise maxima over the image.

    The matched-filter image of white noise (Gaussian kernel of width s) is a smooth random field with
    correlation exp(-r^2 / 4 s^2), i.e. gradient variance 1 / (2 s^2) per axis for unit variance. By random-field
    theory the expected number of its local maxima above a high level t over an area S (the Euler characteristic
    density) is

        E(t) = S / (2 s^2) * t exp(-t^2 / 2) / (2 pi)^(3/2),

    and t solves E(t) = ``expected_false``. For 1024^2 px and s = 1.5 px that is about 5.0 sigma, for 4096^2 px
    about 5.5 sigma: the threshold follows the image size, not a hand-tuned number.

    References
    ----------
    Adler, The Geometry of Random Fields (1981), ch. 6; Worsley et al., Hum. Brain Mapp. 4 (1996) 58, eq. (2)
    (2-D Euler characteristic density), from memory.
    """
    k = max(area_px, 1.0) / (2.0 * sigma_px**2) / (2.0 * math.pi) ** 1.5 / expected_false
    t = 3.0
    for _ in range(50):  # solve ln k + ln t - t^2 / 2 = 0 by Newton's method, from t = 3 (the large root)
        f = math.log(k) + math.log(t) - 0.5 * t * t
        t_new = t - f / (1.0 / t - t)
        if abs(t_new - t) < 1e-9:
            break
        t = max(t_new, 1.5)
    return float(max(t, 3.0))


def pixel_noise_sd(image, valid) -> float:
    """Robust per-pixel noise standard deviation: MAD of horizontal neighbour differences / sqrt(2).

    Column structure a few px wide changes little between neighbouring pixels, white noise fully; the median
    absolute deviation (x 1.4826 for a normal distribution) ignores the minority of steep pixels.
    """
    d = np.diff(image, axis=1)
    both = valid[:, 1:] & valid[:, :-1]
    v = d[both]
    if v.size == 0:
        return float("nan")
    return float(1.4826 * np.median(np.abs(v - np.median(v))) / math.sqrt(2.0))


def find_columns(image, *, valid=None, pixel_size_nm=None, regions=None, dark_columns=False,
                 column_diameter_nm=None, column_spacing_nm=None, min_mass=None, flatten=False, n_species=None,
                 rng=0, progress=None) -> tuple[pd.DataFrame, dict]:
    """Find and refine the atomic columns of an image.

    Parameters
    ----------
    image : (H, W) array
        The micrograph. Not modified. NaN/inf pixels are treated as masked.
    valid : (H, W) bool array, optional
        False for masked pixels: no column is reported inside or touching the mask.
    pixel_size_nm : float, optional
        Pixel size; None leaves every ``*_nm`` column NaN.
    regions : list of region.Region, optional
        Keep only columns inside a region; ``region`` = its label (first region wins on overlap). Fits near a
        region edge use the full image.
    dark_columns : bool
        Columns darker than the background (HRTEM-like); the image is inverted before detection and fitting.
    column_diameter_nm : float, optional
        Overrides the automatic width: sigma = diameter / 4.5. Needs ``pixel_size_nm``.
    column_spacing_nm : float, optional
        Overrides the automatic nearest-column spacing. Needs ``pixel_size_nm``.
    min_mass : float, optional
        Extra minimum trackpy mass (image units x px^2) applied to the candidates before refinement.
    flatten : bool
        Subtract a large-scale Gaussian blur (3 x spacing) before detection (uneven illumination).
    n_species : int, optional
        Species classes: None = BIC choice, 0 = skip (species -1), k = k classes.
    rng : int or numpy Generator
        Seeds the species EM starts.
    progress : callable, optional
        ``progress(fraction, message)``; returning False cancels (raises ``Cancelled``).

    Returns
    -------
    columns : DataFrame
        Conformed to ``_schema.COLUMNS`` (``id`` from 0, positions, widths and errors in px and nm, ``amplitude``,
        ``background``, ``intensity``, ``residual``, ``fit_status`` = 'ok' for every returned row, ``species``,
        ``species_prob``, ``region``) plus extras ``x_err_px``, ``y_err_px``, ``amplitude_err``, ``snr``, ``mass``.
        Empty (with these columns) when nothing survives.
    info : dict
        JSON-safe: ``automatic`` (scale, diameter, separation, significance cut and how each was chosen),
        ``polarity``, ``counts`` (candidates and rows left after each filter), ``refinement`` (fit statistics,
        compile time), ``species`` (from ``classify_species``), ``calibrated``, ``notes``.

    Raises
    ------
    TenfoldInputError
        Bad image or parameters; ``*_nm`` override without ``pixel_size_nm``; no column scale found.

    References
    ----------
    Crocker & Grier, J. Colloid Interface Sci. 179 (1996) 298 (the detection trackpy implements).
    
    Examples
    --------
    >>> cols, info = find_columns(img, pixel_size_nm=0.04)  # doctest: +SKIP
    """
    t_start = time.perf_counter()
    img = np.asarray(image)
    if img.ndim != 2:
        raise TenfoldInputError(f"find_columns: image must be 2-D, got shape {img.shape}; pass a single frame")
    if img.size == 0:
        raise TenfoldInputError("find_columns: image is empty")
    if not (np.issubdtype(img.dtype, np.number) and not np.iscomplexobj(img)):
        raise TenfoldInputError(f"find_columns: image dtype {img.dtype} is not real-valued numbers")
    ok = np.isfinite(img)
    if valid is not None:
        v = np.asarray(valid, dtype=bool)
        if v.shape != img.shape:
            raise TenfoldInputError(f"find_columns: valid mask shape {v.shape} differs from image {img.shape}")
        ok &= v
    if ok.sum() < 16:
        raise TenfoldInputError("find_columns: fewer than 16 valid pixels; nothing to analyse")
    for name, val in (("column_diameter_nm", column_diameter_nm), ("column_spacing_nm", column_spacing_nm)):
        if val is not None:
            if pixel_size_nm is None:
                raise TenfoldInputError(f"{name}={val} is in nm but the image has no pixel size; give pixel_size_nm "
                                        "or leave it automatic")
            if not (np.isfinite(val) and val > 0):
                raise TenfoldInputError(f"{name}={val!r} must be a positive number of nm")
    if pixel_size_nm is not None and not (np.isfinite(pixel_size_nm) and pixel_size_nm > 0):
        raise TenfoldInputError(f"pixel_size_nm={pixel_size_nm!r} must be a positive number or None")
    notes: list[str] = []
    data = np.where(ok, img, np.median(img[ok])).astype(np.float64)
    counts_like = bool(np.all(data[ok] >= 0) and np.all(np.mod(data[ok], 1.0) == 0))
    work = (data.max() - data) if dark_columns else data
    report(progress, 0.0, "column scale")

    auto: dict = {}
    need_scale = column_spacing_nm is None or column_diameter_nm is None
    est = estimate_scale(data, valid=ok, dark_columns=dark_columns) if need_scale else None
    if column_spacing_nm is None:
        spacing = est.spacing_px
        auto["spacing"] = {"value_px": spacing, "how": est.spacing_method}
    else:
        spacing = column_spacing_nm / pixel_size_nm
        auto["spacing"] = {"value_px": spacing, "how": "given (column_spacing_nm)"}
    if column_diameter_nm is None:
        sigma = est.sigma_px
        auto["sigma"] = {"value_px": sigma, "how": est.sigma_method}
    else:
        sigma = column_diameter_nm / pixel_size_nm / 4.5
        auto["sigma"] = {"value_px": sigma, "how": "given (column_diameter_nm / 4.5)"}
    if est is not None:
        auto["scale_details"] = est.details
    if not (sigma > 0.3 and spacing > 2 * sigma * 0.9):
        raise TenfoldInputError(f"find_columns: column width {sigma:.2f} px and spacing {spacing:.2f} px are not "
                                "usable (need sigma > 0.3 px and spacing > 1.8 sigma); check the nm overrides")

    skew = polarity_skewness(work, ok, spacing_px=spacing)
    polarity = {"skewness": skew, "dark_columns": bool(dark_columns), "looks_wrong": bool(skew < -0.1)}
    if polarity["looks_wrong"]:
        msg = (f"find_columns: dark_columns={dark_columns} looks wrong for this image (skewness of the analysed "
               f"image {skew:.2f} < 0, i.e. the columns seem {'bright' if dark_columns else 'dark'}); "
               f"try dark_columns={not dark_columns}")
        warnings.warn(msg, TenfoldWarning, stacklevel=2)
        notes.append(msg)

    detect = work
    if flatten:
        detect = work - ndimage.gaussian_filter(work, 3.0 * spacing)
        auto["flatten"] = {"gaussian_sigma_px": 3.0 * spacing, "used_for": "detection only"}
    diameter = int(math.ceil(4.5 * sigma))
    diameter += 1 - diameter % 2
    diameter = max(diameter, 3)
    separation = max(0.5 * spacing, 1.5)
    auto["trackpy"] = {"diameter_px": diameter, "diameter_how": "smallest odd integer >= 4.5 sigma",
                       "separation_px": separation, "separation_how": "0.5 x spacing", "percentile": 0,
                       "max_iterations": 1, "min_mass": min_mass, "engine": "numba"}
    report(progress, 0.1, "detecting columns (trackpy)")
    t0 = time.perf_counter()
    # the one image-sized filter: the Gaussian matched filter (column width); trackpy finds its maxima
    smooth = ndimage.gaussian_filter(detect.astype(np.float32), sigma)
    xs, ys, mass, n_raw = _locate(smooth, ok, diameter, separation, min_mass)
    del smooth
    counts_tab = {"trackpy_maxima": n_raw, "after_min_mass": int(xs.size)}
    fit_counts = counts_like and not dark_columns
    noise_sd = None if fit_counts else pixel_noise_sd(work, ok)
    if not fit_counts and not (noise_sd and noise_sd > 0):
        noise_sd = float(np.std(work[ok])) or 1.0
    area = float(ok.sum())
    z_cut = false_alarm_threshold(area, sigma)
    rad = int(min(max(round(0.6 * spacing), math.ceil(2.5 * sigma)), math.ceil(3.0 * sigma)))
    t_compile = warm_up()
    amp0, amp0_err = matched_significance(work, np.c_[xs, ys], sigma_px=sigma, patch_radius_px=rad, valid=ok,
                                          counts=fit_counts, noise_sd=noise_sd)
    z0 = amp0 / amp0_err
    pre = np.isfinite(z0) & (z0 >= PRESCREEN_Z)
    xs, ys, mass = xs[pre], ys[pre], mass[pre]
    counts_tab["after_prescreen"] = int(xs.size)
    t_detect = time.perf_counter() - t0 - t_compile
    auto["significance"] = {
        "z_cut": z_cut, "prescreen_z": PRESCREEN_Z, "expected_false_maxima": FALSE_ALARMS,
        "noise": "Poisson variance of the model (raw counts)" if fit_counts else
                 f"per-pixel sd {noise_sd:.4g} (MAD of neighbour differences)",
        "how": "matched filter (Gaussian of the column width + local background, neighbours subtracted) "
               "A / sigma_A >= z_cut; z_cut from the random-field false-alarm rate for the image area"}

    report(progress, 0.3, f"refining {xs.size} candidates")
    t0 = time.perf_counter()
    fit = refine_columns(work, np.c_[xs, ys], sigma_px=sigma, valid=ok, counts=fit_counts, patch_radius_px=rad,
                         neighbour_passes=1, noise_sd=noise_sd, progress=sub_progress(progress, 0.3, 0.85))
    auto["patch_radius_px"] = {"value": rad, "how": "0.6 x spacing, clipped to [ceil(2.5 sigma), ceil(3 sigma)]"}
    t_refine = time.perf_counter() - t0
    fit["mass"] = mass
    status = fit["fit_status"].value_counts().to_dict()
    counts_tab["fit_status"] = {str(k): int(v) for k, v in status.items()}
    fit = fit[fit["fit_status"] == "ok"].copy()
    # final significance: background held at the median fitted background of the 12 nearest fits (a smooth
    # background is far better determined than a free one per patch), neighbours' models subtracted
    if len(fit) > 1:
        xy_f = fit[["x_px", "y_px"]].to_numpy()
        _, nn = cKDTree(xy_f).query(xy_f, k=min(13, len(fit)))
        b_ref = np.median(fit["background"].to_numpy()[nn], axis=1)
        amp_f, amp_e = significance_with_neighbours(work, fit, sigma_px=sigma, patch_radius_px=rad, background=b_ref,
                                                    valid=ok, counts=fit_counts, noise_sd=noise_sd)
        fit["snr"] = amp_f / amp_e
    else:
        fit["snr"] = fit["mf_amplitude"] / fit["mf_amplitude_err"]
    # and the free-background matched filter (neighbours subtracted) must show an excess too (>= 2 sigma, common
    # practice), which rejects background structure that a constant local background cannot describe
    free_z = (fit["mf_amplitude"] / fit["mf_amplitude_err"]).to_numpy()
    fit = fit[np.isfinite(fit["snr"]) & (fit["snr"] >= z_cut) & (free_z >= 2.0)]
    counts_tab["after_significance"] = int(len(fit))
    # duplicates: candidates that converged on the same column
    if len(fit) > 1:
        xy = fit[["x_px", "y_px"]].to_numpy()
        pairs = cKDTree(xy).query_pairs(max(1.0, sigma), output_type="ndarray")
        if pairs.size:
            snr = fit["snr"].to_numpy()
            lose = np.where(snr[pairs[:, 0]] < snr[pairs[:, 1]], pairs[:, 0], pairs[:, 1])
            fit = fit.drop(fit.index[np.unique(lose)])
    counts_tab["after_duplicates"] = int(len(fit))
    if dark_columns:
        # back to image units: the fitted background was measured on the inverted image
        fit["background"] = data.max() - fit["background"]
    region = np.zeros(len(fit), dtype=np.int64)
    if regions:
        region = label_points(fit["x_px"].to_numpy(), fit["y_px"].to_numpy(), regions)
        fit = fit[region > 0].copy()
        region = region[region > 0]
        counts_tab["after_regions"] = int(len(fit))
    fit["region"] = region
    fit = fit.sort_values(["y_px", "x_px"], kind="stable").reset_index(drop=True)
    fit["id"] = np.arange(len(fit), dtype=np.int64)
    ps = np.nan if pixel_size_nm is None else float(pixel_size_nm)
    for q in ("x", "y", "sigma", "pos_err"):
        fit[f"{q}_nm"] = fit[f"{q}_px"] * ps
    if pixel_size_nm is None:
        notes.append("image uncalibrated: *_nm columns are NaN")
    report(progress, 0.9, "species")
    fit["species"] = -1
    fit["species_prob"] = np.nan
    fit, sp_info = classify_species(fit, n_species=n_species, rng=rng)
    notes.extend(sp_info.get("notes", []))
    if len(fit) == 0:
        notes.append("no columns survived the filters")
    extras = ["x_err_px", "y_err_px", "amplitude_err", "snr", "mass"]
    table = _schema.conform(fit[[f.name for f in _schema.COLUMNS] + extras], _schema.COLUMNS)
    ok_fit = table["fit_status"] == "ok"
    info = {
        "automatic": auto,
        "polarity": polarity,
        "counts": counts_tab,
        "refinement": {
            "model": "pixel-integrated isotropic Gaussian + constant background, Levenberg-Marquardt",
            "weighting": "Poisson 1/max(model,1)" if (counts_like and not dark_columns) else "unweighted",
            "image_is_counts": counts_like,
            "neighbour_passes": 1,
            "median_sigma_px": float(table.loc[ok_fit, "sigma_px"].median()) if ok_fit.any() else None,
            "median_pos_err_px": float(table.loc[ok_fit, "pos_err_px"].median()) if ok_fit.any() else None,
            "median_residual": float(table.loc[ok_fit, "residual"].median()) if ok_fit.any() else None,
            "compile_or_cache_load_s": t_compile,
            "detect_s": t_detect,
            "refine_s": t_refine,
        },
        "species": sp_info,
        "calibrated": pixel_size_nm is not None,
        "n_columns": int(len(table)),
        "seconds": time.perf_counter() - t_start,
        "notes": notes,
    }
    report(progress, 1.0, f"{len(table)} columns")
    return table, _json_safe(info)


def _json_safe(o):
    if isinstance(o, dict):
        return {str(k): _json_safe(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_json_safe(v) for v in o]
    if isinstance(o, (np.integer,)):
        return int(o)
    if isinstance(o, (np.floating, float)):
        return float(o) if math.isfinite(o) else None
    if isinstance(o, np.bool_):
        return bool(o)
    return o
