"""Figures (matplotlib, no display needed) shared by the command line, the report and the plugin.

Every function returns a matplotlib Figure; :func:`save_png` writes one
atomically. Verdicts are told apart by marker shape and text as well as by
colour, so that no reading depends on telling red from green; colours come
from :mod:`.style`, shared with the report and the napari plugin. Names from
users' files (labels, channels) are drawn as plain text (:func:`plain`):
matplotlib would read text between two ``$`` as mathematics and fail on it.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .summary import fixed
from .style import COMPARISON_LOOK, hex_colour, label_colour, wavelength_colour


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def plain(name, longest: int = 60) -> str:
    """A user's name as matplotlib draws it literally: every ``$`` escaped, and cut to `longest`
    characters (a name of thousands would squeeze the plot to nothing)."""
    name = str(name)
    if len(name) > longest:
        name = name[:longest - 3] + "..."
    return name.replace("$", r"\$")


def png_bytes(figure) -> bytes:
    """`figure` rendered as PNG (then closed)."""
    import io

    buffer = io.BytesIO()
    try:
        figure.savefig(buffer, format="png", dpi=110, bbox_inches="tight")
    finally:
        _pyplot().close(figure)
    return buffer.getvalue()


def save_png(figure, path) -> Path:
    """Write `figure` as PNG atomically and close it (rendered before anything is written)."""
    from ..io.atomic import write_files_atomic

    path = Path(path)
    write_files_atomic({path: png_bytes(figure)})
    return path


def comparison_pngs(measured, predicted, comparison, description=None) -> dict:
    """The figures of a comparison as PNG files, ``{name: bytes}``: the matrices side by side,
    measured against predicted and (with a description) the spectra."""
    from ..optics.comparison import aligned_prediction

    pngs = {"compare-matrices.png": png_bytes(matrices_figure(measured, aligned_prediction(measured, predicted,
                                                                                           "compare"))),
            "compare-scatter.png": png_bytes(comparison_figure(comparison))}
    if description is not None:
        pngs["compare-spectra.png"] = png_bytes(spectra_figure(description))
    return pngs


def _band_centre(curve, nm) -> float | None:
    """Transmission-weighted mean wavelength of a filter curve (its pass band), or None."""
    values = np.clip(curve(nm), 0, None)
    values = np.where(values >= 0.5 * values.max(), values, 0.0) if values.max() > 0 else values
    return float(np.sum(nm * values) / np.sum(values)) if values.sum() > 0 else None


def spectra_figure(description):
    """One panel per channel: the labels' emission spectra (peak 1), the channel's detection band
    shaded, its dichroic dashed and its excitation dotted.

    Each label is drawn in the colour of its emission peak wavelength; each channel's name and
    band in the colour of the band's centre wavelength. Names stand outside the data (the channel
    as the panel's axis label, the labels in a legend below the panels) in a constrained layout,
    so none is cut off or drawn over another at any figure width (the plugin's narrow dock too).
    """
    plt = _pyplot()
    from matplotlib.patches import Patch

    nm = description.grid.nm
    n = len(description.channels)
    figure, axes = plt.subplots(n, 1, figsize=(7.0, 1.5 * n + 1.4), sharex=True, squeeze=False,
                                layout="constrained")
    emission, peaks = {}, {}
    for label in description.labels:
        values = label.emission(nm)
        emission[label.name] = values / values.max() if values.max() > 0 else values
        peaks[label.name] = float(nm[np.argmax(values)])
    # Show the part of the grid where something happens: the labels' emission, the bands, the lines.
    seen = np.zeros(nm.shape, bool)
    for values in emission.values():
        seen |= values > 0.01
    for channel in description.channels:
        if channel.emission_filter is not None:
            seen |= channel.emission_filter(nm) > 0.05
    lines = [c.source.line_nm for c in description.channels if c.source.line_nm is not None]
    low = min([float(nm[seen].min())] + lines) if seen.any() else float(nm[0])
    high = max([float(nm[seen].max())] + lines) if seen.any() else float(nm[-1])
    handles = {}
    for axis, channel in zip(axes[:, 0], description.channels):
        centre = _band_centre(channel.emission_filter, nm) if channel.emission_filter is not None else None
        band_colour = wavelength_colour(centre) if centre is not None else (0.6, 0.6, 0.6)
        if channel.emission_filter is not None:
            axis.fill_between(nm, 0, channel.emission_filter(nm), color=band_colour, alpha=0.3, lw=0)
            # The legend's entry stands for every channel's band, each in its own colour: neutral there.
            handles["detection band (emission filter)"] = Patch(color="0.75")
        if channel.dichroic is not None:
            handles["dichroic (transmission)"], = axis.plot(nm, channel.dichroic(nm), color="0.45", ls="--", lw=0.8)
        for name, values in emission.items():
            handles[plain(name)], = axis.plot(nm, values, color=wavelength_colour(peaks[name], on_white=True), lw=1.6)
        source = channel.source
        if source.line_nm is not None:
            handles["excitation"] = axis.axvline(source.line_nm, color="k", lw=1.4, ls=":")
        else:
            power = source.spectrum(nm)
            handles["excitation"], = axis.plot(nm, power / power.max(), color="k", lw=1.0, ls=":")
        axis.set_ylabel(plain(channel.name), fontsize=9, fontweight="bold",
                        color=wavelength_colour(centre, on_white=True) if centre else "k")
        axis.set_ylim(0, 1.05)
        axis.set_yticks([0, 0.5, 1])
    axes[-1, 0].set_xlim(max(low - 15, nm[0]), min(high + 15, nm[-1]))
    axes[-1, 0].set_xlabel("wavelength (nm)")
    figure.legend(list(handles.values()), list(handles), loc="outside lower center", ncol=2, fontsize=8,
                  frameon=False)
    figure.suptitle("Emission spectra (peak 1) and each channel's bands", fontsize=10)
    return figure


def _block_mean(plane: np.ndarray, largest: int) -> np.ndarray:
    """`plane` shrunk by an integer factor (mean over blocks) to at most `largest` pixels a side."""
    factor = int(np.ceil(max(plane.shape) / largest))
    if factor <= 1:
        return plane
    ny, nx = (s // factor * factor for s in plane.shape)
    return plane[:ny, :nx].reshape(ny // factor, factor, nx // factor, factor).mean(axis=(1, 3))


def sample_figure(signal: np.ndarray, abundances: np.ndarray, matrix, title: str = ""):
    """Raw against unmixed, as thumbnails: a composite of each, then each label on its own.

    `signal` (C, Y, X) is the raw plane in the matrix's channel order, background subtracted;
    `abundances` (K, Y, X) its unmixed labels, in the same units (intensity in each label's
    primary channel). Top row: each label's primary channel as raw; bottom row: the label itself.
    Each label keeps one colour and one display range in both rows, so what unmixing removed from
    a channel shows as what darkens.
    """
    plt = _pyplot()
    labels = list(matrix.labels)
    primaries = [matrix.channels.index(matrix.primary[label]) for label in labels]
    raw = [_block_mean(np.nan_to_num(signal[c].astype(np.float64)), 384) for c in primaries]
    unmixed = [_block_mean(np.nan_to_num(abundances[k].astype(np.float64)), 384) for k in range(len(labels))]
    tops = [max(float(np.percentile(r, 99.5)), 1e-12) for r in raw]
    columns = 1 + len(labels)
    side = min(2.3, 11.0 / columns)
    figure, axes = plt.subplots(2, columns, figsize=(side * columns, side * 2 + 0.7), squeeze=False,
                                layout="constrained")

    def composite(planes):
        rgb = np.zeros(planes[0].shape + (3,))
        for k, (plane, top) in enumerate(zip(planes, tops)):
            rgb += np.clip(plane / top, 0, 1)[..., None] * np.asarray(label_colour(k)[1])
        return np.clip(rgb, 0, 1)

    for row, (planes, what) in enumerate(((raw, "raw"), (unmixed, "unmixed"))):
        axes[row, 0].imshow(composite(planes), interpolation="nearest")
        axes[row, 0].set_title(f"{what}: composite", fontsize=8)
        for k, label in enumerate(labels):
            axis = axes[row, k + 1]
            axis.imshow(planes[k], cmap="gray", vmin=0, vmax=tops[k], interpolation="nearest")
            name = f"{label}'s channel {matrix.primary[label]}" if row == 0 else label
            axis.set_title(f"{what}: {name}", fontsize=8, color=hex_colour(
                tuple(0.75 * v for v in label_colour(k)[1])))
    for axis in axes.ravel():
        axis.set_xticks([])
        axis.set_yticks([])
    if title:
        figure.suptitle(title, fontsize=9)
    return figure


def matrices_figure(measured, predicted_values: np.ndarray):
    """Measured and predicted matrices side by side as annotated heat maps (same colour scale)."""
    plt = _pyplot()
    figure, axes = plt.subplots(1, 2, figsize=(2.2 + 1.5 * len(measured.labels) * 2, 1.0 + 0.7 * len(measured.channels)))
    top = max(float(np.max(measured.matrix)), float(np.max(predicted_values)), 1.0)
    for axis, values, title in ((axes[0], measured.matrix, "measured"), (axes[1], predicted_values, "predicted")):
        image = axis.imshow(values, cmap="viridis", vmin=0, vmax=top)
        for (c, k), value in np.ndenumerate(values):
            axis.text(k, c, fixed(value, 3), ha="center", va="center", fontsize=8,
                      color="white" if value < 0.6 * top else "black")
        axis.set_xticks(range(len(measured.labels)), [plain(n) for n in measured.labels], rotation=30, ha="right")
        axis.set_yticks(range(len(measured.channels)), [plain(n) for n in measured.channels])
        axis.set_title(title)
    figure.colorbar(image, ax=axes, shrink=0.8, label="coefficient")
    return figure


def comparison_figure(comparison):
    """Measured against predicted on log axes, 95 % intervals as bars, the tolerance band shaded."""
    plt = _pyplot()
    figure, axis = plt.subplots(figsize=(5.5, 5.0))
    floor = comparison.detection_floor / 10
    values = [max(v, floor) for row in comparison.coefficients
              for v in (row["measured"], row["predicted"], row["ci95"][1])] or [1.0]
    low, high = min(values) / 2, max(max(values) * 2, 1.0)
    line = np.geomspace(low, high, 50)
    axis.fill_between(line, line / (1 + comparison.tolerance), line * (1 + comparison.tolerance), color="0.9",
                      label=f"model tolerance ±{comparison.tolerance:.0%}")
    axis.plot(line, line, color="0.5", lw=0.8)
    for verdict, (colour, marker) in COMPARISON_LOOK.items():
        rows = [r for r in comparison.coefficients if r["verdict"] == verdict]
        if not rows:
            continue
        x = np.array([max(r["predicted"], floor) for r in rows])
        y = np.array([max(r["measured"], floor) for r in rows])
        lo = np.array([max(r["ci95"][0], floor) for r in rows])
        hi = np.array([max(r["ci95"][1], floor) for r in rows])
        axis.errorbar(x, y, yerr=[np.maximum(y - lo, 0), np.maximum(hi - y, 0)], fmt=marker, color=colour,
                      ms=7, capsize=2, label=verdict)
        for r, xi, yi in zip(rows, x, y):
            if verdict in ("higher", "lower"):
                axis.annotate(f"{plain(r['label'])} in {plain(r['channel'])}", (xi, yi), fontsize=7, xytext=(4, 4),
                              textcoords="offset points")
    axis.axvspan(low, comparison.detection_floor, color="0.95", zorder=-1)
    axis.set_xscale("log")
    axis.set_yscale("log")
    axis.set_xlim(low, high)
    axis.set_ylim(low, high)
    axis.set_xlabel("predicted coefficient")
    axis.set_ylabel("measured coefficient (95 % interval)")
    axis.legend(fontsize=8, loc="upper left")
    axis.set_title("Measured versus predicted bleed-through", fontsize=10)
    return figure


def coloc_histograms(before_pixels, after_pixels, result, stacked: bool = False):
    """2-D intensity histograms of the pair before and after unmixing (log colour scale), with the
    thresholds and the orthogonal regression line drawn; the verdict in the title. Side by side,
    or one above the other with `stacked` (for a narrow panel)."""
    from matplotlib.colors import LogNorm

    from ..coloc.statistics import orthogonal_regression

    plt = _pyplot()
    figure, axes = plt.subplots(*((2, 1) if stacked else (1, 2)), figsize=(5.4, 9.0) if stacked else (10.5, 4.8),
                                layout="constrained")
    a_label, b_label = (plain(name) for name in result.pair)
    for axis, (a, b), coefficients, title in (
            (axes[0], before_pixels, result.before, "before: primary channels, background subtracted"),
            (axes[1], after_pixels, result.after, "after: least-squares abundances")):
        a, b = np.asarray(a, dtype=float).ravel(), np.asarray(b, dtype=float).ravel()
        keep = np.isfinite(a) & np.isfinite(b)
        a, b = a[keep], b[keep]
        if a.size == 0:
            axis.set_title(f"{title}\n(no pixels)", fontsize=9)
            continue
        _, _, _, image = axis.hist2d(a, b, bins=128, norm=LogNorm(), cmap="magma")
        figure.colorbar(image, ax=axis, label="pixels")
        if coefficients.thresholds is not None:
            t_a, t_b = coefficients.thresholds
            axis.axvline(t_a, color="#56B4E9", lw=1, ls="--", label=f"threshold {a_label}")
            axis.axhline(t_b, color="#56B4E9", lw=1, ls=":", label=f"threshold {b_label}")
        if np.ptp(a) > 0 and np.ptp(b) > 0:
            slope, intercept = orthogonal_regression(a, b)
            x = np.array([a.min(), a.max()])
            axis.plot(x, slope * x + intercept, color="white", lw=1.2, label="orthogonal regression")
            axis.set_ylim(b.min(), b.max())
        r = "undefined" if coefficients.pearson is None else f"{coefficients.pearson:.3f}"
        p = "-" if coefficients.p_value is None else f"{coefficients.p_value:.3g}"
        corrected = ""
        if coefficients is result.after and result.after_corrected.r is not None:
            corrected = f", noise-corrected {result.after_corrected.r:.3f}"
        axis.set_title(f"{title}\nPearson r = {r}{corrected}, p = {p}", fontsize=9)
        axis.set_xlabel(a_label)
        axis.set_ylabel(b_label)
        axis.legend(fontsize=7, loc="upper left")
    figure.suptitle(f"{a_label} and {b_label}: {result.verdict}", fontsize=11)
    return figure


def depth_profile_figure(record: dict):
    """Each plane's before-r and noise-corrected after-r (with its 95 % interval) of a z-stack result,
    and the fitted depth trend."""
    plt = _pyplot()
    from matplotlib.ticker import MaxNLocator

    profile = record.get("plane_profile") or []
    figure, axis = plt.subplots(figsize=(8.0, 3.4), layout="constrained")
    first = (record.get("planes") or [0])[0]
    planes = [first + p["plane"] for p in profile]
    corrected = [np.nan if p["pearson_noise_corrected"] is None else p["pearson_noise_corrected"] for p in profile]
    low = [np.nan if p["interval"] is None else p["interval"][0] for p in profile]
    high = [np.nan if p["interval"] is None else p["interval"][1] for p in profile]
    before = [np.nan if p["pearson_before"] is None else p["pearson_before"] for p in profile]
    axis.fill_between(planes, low, high, color="#56B4E9", alpha=0.3, label="after, 95 % interval")
    axis.plot(planes, corrected, "o-", color="#0072B2", label="after, noise-corrected r")
    axis.plot(planes, before, "s--", color="#D55E00", label="before (raw channels) r")
    trend = record.get("depth_trend") or {}
    if trend.get("slope_per_plane") is not None and np.isfinite(corrected).any():
        keep = np.isfinite(corrected)
        x = np.asarray(planes, dtype=float)
        centre = np.nanmean(np.asarray(corrected)[keep])
        axis.plot(x, centre + trend["slope_per_plane"] * (x - x[keep].mean()), color="#444444", lw=1,
                  label="depth trend" + (" (flagged)" if trend.get("flagged") else ""))
    if record.get("min_r") is not None:
        axis.axhline(record["min_r"], color="#999999", lw=0.8, ls=":", label="smallest r that counts")
    axis.xaxis.set_major_locator(MaxNLocator(integer=True))
    axis.set_xlabel("plane")
    axis.set_ylabel("Pearson r")
    axis.set_title(plain(f"{record['pair'][0]} and {record['pair'][1]} by depth") + f"\n{record['verdict']}",
                   fontsize=10)
    # Beside the axes, never over a plane's points.
    axis.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0)
    return figure


def time_figure(summary: dict):
    """A time series: the corrected after-r per time point (with its interval) and each label's mean
    signal relative to the first time point (bleaching or drift)."""
    plt = _pyplot()
    from matplotlib.ticker import MaxNLocator

    figure, (top, bottom) = plt.subplots(2, 1, figsize=(6.4, 5.0), sharex=True, layout="constrained")
    frames = summary["frames"]
    corrected = [np.nan if r is None else r for r in summary["pearson_noise_corrected"]]
    low = [np.nan if i is None else i[0] for i in summary["intervals"]]
    high = [np.nan if i is None else i[1] for i in summary["intervals"]]
    top.fill_between(frames, low, high, color="#56B4E9", alpha=0.3, label="95 % interval")
    top.plot(frames, corrected, "o-", color="#0072B2", label="after, noise-corrected r")
    top.set_ylabel("Pearson r")
    top.legend(fontsize=7, loc="best")
    top.set_title(plain(f"{summary['pair'][0]} and {summary['pair'][1]} over time"), fontsize=10)
    for (label, bleaching), colour in zip(summary["bleaching"].items(), ("#D55E00", "#009E73")):
        series = np.array([np.nan if v is None else v for v in bleaching["mean_signal"]], dtype=float)
        relative = series / series[0] if series.size and series[0] > 0 else series
        bottom.plot(frames, relative, "o-", color=colour,
                    label=plain(label) + (" (flagged)" if bleaching["flagged"] else ""))
    bottom.axhline(1 - summary.get("bleach_limit", 0.2), color="#999999", lw=0.8, ls=":", label="bleaching limit")
    bottom.xaxis.set_major_locator(MaxNLocator(integer=True))
    bottom.set_xlabel("time point")
    bottom.set_ylabel("signal / first")
    bottom.legend(fontsize=7, loc="best")
    return figure
