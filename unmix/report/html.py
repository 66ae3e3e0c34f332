"""The report: one self-contained HTML file for a collaborator or a reviewer.

The page leads with the answer and ends with the paperwork:

1. the answer: each pair's verdict in words, with its symbol and colour (shared with the napari
   plugin, :mod:`.style`), the corrected after-r with its 95 % interval and one sentence;
2. QC problems, or that none was found;
3. the sample, raw beside unmixed, as thumbnails;
4. each pair in detail: coefficients by family, footnotes, histograms; for a z-stack, that the verdict is
   over voxels in 3-D, its planes and Z step, and each plane's r; for a time series, the verdicts per
   time point, the r over time and the bleaching and unmixing-fit checks;
5. the matrix with its QC table (problems flagged in their rows), measured versus predicted and
   the spectra when a description is given;
6. cautions, inputs with their checksums, references.

Everything is inside the file: figures are PNG data URIs, styles are inline, nothing is loaded from
the network (references are plain links). Every name that comes from a user's file (labels,
channels, paths) is HTML-escaped. Colocalization results made with another matrix than the one
reported are refused, and so are results that do not record their matrix: a report must not
combine numbers that rest on different matrices. A PDF is not made: print the page from a browser.
"""

from __future__ import annotations

import base64
import html
import io
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..matrix import BleedThroughMatrix
from ..coloc.verdict import VERDICTS, matrix_warnings
from .style import VERDICT_LOOK
from .summary import fixed

CAUTIONS = (
    "Results hold only for controls acquired with the samples' settings (gain, exposure, laser power, pinhole, "
    "detector voltage).",
    "Saturated pixels are excluded, not corrected.",
    "Unmixing raises noise (the noise penalty says by how much), and the unmixed noise of two labels is "
    "correlated: the after-r is corrected for it, and its interval covers the region as imaged, not the "
    "variation between cells or specimens.",
    "A verdict is only as good as the matrix and the noise model behind it: measure the matrix from at least "
    "three control fields per label, with a dark frame.",
    "Colocalization coefficients measure co-occurrence and correlation at optical resolution, not molecular "
    "interaction.",
    "Keep the raw data; unmix never modifies its inputs.",
    "For the hardware side (lasers, arc lamps), follow your institution's safety rules.",
)
# Shown wherever results of z-stacks are (their detail, and the cautions).
PROJECTION_CAUTION = (
    "Never measure a projection of a stack: a maximum or sum projection lays several depths on top of each other "
    "and makes labels that never meet co-occur (Bolte & Cordelières 2006, J. Microsc. 224:213). Stacks here are "
    "measured in 3-D, over their voxels.")
REFERENCES = (
    ("E. M. M. Manders, F. J. Verbeek & J. A. Aten (1993), J. Microsc. 169:375", "https://doi.org/10.1111/j.1365-2818.1993.tb03313.x"),
    ("S. V. Costes et al. (2004), Biophys. J. 86:3993", "https://doi.org/10.1529/biophysj.103.038422"),
    ("Q. Li et al. (2004), J. Neurosci. 24:4070", "https://doi.org/10.1523/JNEUROSCI.0346-04.2004"),
    ("S. Bolte & F. P. Cordelières (2006), J. Microsc. 224:213", "https://doi.org/10.1111/j.1365-2818.2006.01706.x"),
    ("B. Phipson & G. K. Smyth (2010), Stat. Appl. Genet. Mol. Biol. 9:39", "https://doi.org/10.2202/1544-6115.1585"),
    ("C. L. Lawson & R. J. Hanson (1974), Solving Least Squares Problems", None),
    ("C. Spearman (1904), Am. J. Psychol. 15:72 (correction for attenuation)", None),
    ("J. Adler, S. N. Pagakis & I. Parmryd (2008), J. Microsc. 230:121 (noise-corrected correlation)", None),
    ("M. Roederer (2001), Cytometry 45:194 (compensation and its spread)", None),
    ("R. A. Fisher (1915), Biometrika 10:507 (z transform of r)", None),
    ("K. Pearson (1897), Proc. R. Soc. Lond. 60:489 (spurious correlation of ratios)", None),
    ("R. DerSimonian & N. Laird (1986), Control. Clin. Trials 7:177; J. Hartung & G. Knapp (2001), Stat. Med. "
     "20:3875 (random-effects intervals over control fields)", None),
    ("A. Foi et al. (2008), IEEE Trans. Image Process. 17:1737 (noise line from one image)", None),
    ("D. B. Siano & D. E. Metzler (1969), J. Chem. Phys. 51:1856", "https://doi.org/10.1063/1.1672270"),
    ("M. Okabe & K. Ito (2008), Color Universal Design (colour-blind-safe palette of the verdicts)", None),
)
# Footnotes on coefficients that look wrong but are what the definitions give.
FOOTNOTES = {
    "negative threshold": (
        "A negative Costes threshold. Costes' search lowers A's threshold T, and B's along the regression line "
        "(a T + b), until the pixels below both stop correlating. When the channels correlate down to the noise "
        "floor (bleed-through, or structures on a dim background), the search ends at the background and a "
        "threshold falls below 0: every pixel then counts as above it. It is what the method gives, not an error."),
    "manders one": (
        "A Manders coefficient of exactly 1: all of this label's signal lies where the other label is above its "
        "threshold. With a threshold at or below the background (a negative one, above) every pixel passes, "
        "so the 1 says nothing about co-occurrence: read Pearson r and the verdict instead."),
}
_FAMILIES = (  # the coefficient rows, grouped by family
    ("correlation", (("pearson", "Pearson r"), ("spearman", "Spearman rho"), ("icq", "Li's ICQ"))),
    ("co-occurrence", (("overlap", "Manders overlap"), ("manders_m1", "Manders M1"), ("manders_m2", "Manders M2"),
                       ("m1_above_own_threshold", "M1 above own threshold (Costes)"),
                       ("m2_above_own_threshold", "M2 above own threshold (Costes)"))),
    ("significance", (("p_value", "p (randomisation)"),)),
)

_STYLE = """
body { font-family: sans-serif; max-width: 1180px; margin: 1.2em auto; padding: 0 1em; color: #222;
       line-height: 1.4; }
h1 { font-size: 1.5em; margin-bottom: .1em; } h2 { border-bottom: 1px solid #ccc; padding-bottom: .2em;
   margin-top: 1.5em; font-size: 1.25em; } h3 { margin-top: 1.4em; }
table { border-collapse: collapse; margin: .6em 0; font-size: .9em; }
th, td { border: 1px solid #bbb; padding: .25em .55em; text-align: right; vertical-align: top; }
th:first-child, td:first-child { text-align: left; }
td.text, th.text { text-align: left; }
code.verdict { font-weight: bold; padding: .05em .3em; border-radius: .2em; border: 1px solid #777;
               background: #fff; }
.badge { display: inline-block; color: #000; font-weight: bold; padding: .2em .55em; border: 1px solid #333;
         border-radius: .3em; white-space: nowrap; }
table.answer { font-size: 1em; width: 100%; }
table.answer td, table.answer th { vertical-align: middle; text-align: left; }
table.answer td:nth-child(3), table.answer td:nth-child(4) { white-space: nowrap; }
code.verdict { white-space: nowrap; }
table.inputs td, table.inputs th { text-align: left; }
table.series td:last-child, table.series th:last-child { text-align: left; }
.problems { background: #fff4e5; border-left: 4px solid #D55E00; padding: .4em 1em; }
.fine { background: #eef7ee; border-left: 4px solid #009E73; padding: .4em 1em; }
.caution { background: #fff7e0; border-left: 4px solid #e0a000; padding: .5em 1em; }
tr.flagged td { background: #fff4e5; } td.flag { text-align: left; color: #8a3a00; }
img { max-width: 100%; border: 1px solid #ddd; margin: .4em 0; }
.small { font-size: .85em; color: #555; } sup { color: #8a3a00; font-weight: bold; }
"""


def _e(value) -> str:
    return html.escape(str(value), quote=True)


def _png(figure) -> str:
    from .plots import _pyplot

    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=100, bbox_inches="tight")
    _pyplot().close(figure)
    return "data:image/png;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def _png_file(path: Path) -> str | None:
    try:
        data = path.read_bytes()
    except OSError:
        return None
    return "data:image/png;base64," + base64.b64encode(data).decode("ascii") if data[:8] == b"\x89PNG\r\n\x1a\n" else None


def _number(value, digits: int = 4) -> str:
    if value is None:
        return "undefined"
    return fixed(value, digits) if isinstance(value, (int, float)) and np.isfinite(value) else _e(value)


def _table(header, rows, css: str = "") -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{cell}</td>" for cell in row) + "</tr>" for row in rows)
    return f"<table{f' class={css!r}' if css else ''}><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def verdict_badge(verdict: str, separator: str = " ") -> str:
    """The verdict's symbol and words on its colour, then its code verbatim."""
    look = VERDICT_LOOK[verdict]
    return (f"<span class='badge' style='background:{look.colour}'>{look.symbol} {_e(look.heading)}</span>"
            f"{separator}<code class='verdict'>{_e(verdict)}</code>")


def load_coloc_results(path):
    """The checked records and summaries over time of a coloc JSON file, a
    :class:`~unmix.coloc.records.ColocFile` (see :func:`unmix.coloc.records.load_records`)."""
    from ..coloc.records import load_records

    return load_records(path)


def check_same_matrix(records, matrix: BleedThroughMatrix, matrix_path=None) -> None:
    """Refuse colocalization records that were not made with `matrix` (by its checksum).

    Records without a checksum (written before coloc recorded one) are refused too: which matrix
    they rest on cannot be told, and the report would present them as resting on this one.
    """
    sha = matrix.sha256()
    named = f"--matrix {matrix_path}" if matrix_path is not None else "the report's matrix"
    for record in records:
        where = record.get("source", "coloc results")
        pair = "/".join(str(p) for p in record["pair"])
        used = record.get("matrix_sha256")
        if used is None:
            raise InputError(f"{where}: pair {pair} does not record the matrix it was measured with (written by an "
                             f"older unmix coloc); rerun unmix coloc with {named} and report its output")
        if used != sha:
            raise InputError(f"{where}: pair {pair} was measured with another matrix (checksum {str(used)[:12]}, "
                             f"{named} is {sha[:12]}); rerun unmix coloc with {named}, or report it with its own "
                             "matrix")


def build_report(matrix: BleedThroughMatrix, *, matrix_path=None, predicted: BleedThroughMatrix | None = None,
                 predicted_path=None, coloc_records=(), time_summaries=(), samples=(), description=None,
                 description_path=None, title: str = "Bleed-through and colocalization report") -> str:
    """The report as one HTML string.

    Parameters
    ----------
    matrix : BleedThroughMatrix
        The matrix the results rest on (measured, or predicted).
    predicted : BleedThroughMatrix, optional
        A predicted matrix to compare the measured one with.
    coloc_records : list of dict
        Records of ``unmix coloc --json``; each must have been made with `matrix`.
    time_summaries : list of dict
        The summaries over time of the same files (``time_summaries``): the records of the time
        points each covers are shown together, as one series.
    samples : list of paths
        Raw images to show raw beside unmixed (the middle plane of a stack).
    description : Description, optional
        The optics description; its spectra are drawn.
    """
    from ..io import provenance

    coloc_records = list(coloc_records)
    check_same_matrix(coloc_records, matrix, matrix_path)
    items = _series_grouped(coloc_records, list(time_summaries))
    comparison = None
    if predicted is not None:
        from ..optics.comparison import compare

        comparison = compare(matrix, predicted, where=str(predicted_path or "predicted"))

    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>{_e(title)}</title>"
             f"<style>{_STYLE}</style></head><body>", f"<h1>{_e(title)}</h1>"]
    software = provenance.software()
    parts.append(f"<p class='small'>Made {_e(provenance.utc_now())} by unmix {_e(software['unmix'])}. Inputs, "
                 "checksums and references are at the end.</p>")
    parts.append(_answer(matrix, items, comparison))
    parts.append(_problems(matrix, coloc_records, list(time_summaries)))
    if samples:
        parts.append("<h2>The sample, raw and unmixed</h2>" + "".join(_sample(path, matrix) for path in samples))
    single = [item for item in items if isinstance(item, dict)]
    if single:
        parts.append("<h2>Each pair in detail</h2>")
        parts.append("<p>Verdicts, on Pearson r (overlap = r at least the minimum and the randomisation p below "
                     "alpha):</p><ul>" + "".join(f"<li>{verdict_badge(v)}: {_e(text)}</li>"
                                                  for v, text in VERDICTS.items()) + "</ul>")
        parts += [_coloc_section(record) for record in single]
    series = [item for item in items if isinstance(item, tuple)]
    if series:
        parts.append("<h2>Time series</h2>")
        parts += [_time_section(summary, records) for summary, records in series]
    parts.append(_matrix_section(matrix))
    if comparison is not None:
        parts.append(_comparison_section(matrix, predicted, comparison))
    if description is not None:
        from .plots import spectra_figure

        parts.append("<h2>Spectra and bands</h2>" + (f"<p class='small'>From {_e(description_path)}.</p>"
                                                    if description_path else "")
                     + f"<img alt='label spectra and channel bands' src='{_png(spectra_figure(description))}'>")
    stacks = any(record.get("plane_profile") for record in coloc_records)
    parts.append("<h2>Cautions</h2><div class='caution'><ul>"
                 + "".join(f"<li>{_e(c)}</li>" for c in CAUTIONS + ((PROJECTION_CAUTION,) if stacks else ()))
                 + "</ul></div>")
    parts.append(_inputs(matrix, matrix_path, predicted_path, description_path, coloc_records, samples, software))
    parts.append("<h2>References</h2><ul>" + "".join(
        f"<li>{_e(text)}" + (f" (<a href='{_e(url)}'>link</a>)" if url else "") + "</li>" for text, url in REFERENCES)
        + "</ul></body></html>")
    return "\n".join(parts)


# --- the answer and the problems ------------------------------------------------------

def _where(record: dict) -> str:
    """Where a result (or a summary over time) was measured: image, object, time point, 3-D."""
    parts = [Path(str(record["image"])).name] if record.get("image") else []
    if record.get("object") is not None:
        parts.append(f"object {record['object']}")
    if record.get("frame") is not None:
        parts.append(f"time point {record['frame']}")
    if record.get("plane_profile"):
        parts.append(f"3-D, {len(record['plane_profile'])} planes")
    return ", ".join(parts)


def _series_key(item: dict) -> tuple:
    return item.get("source"), item.get("image"), tuple(item["pair"]), item.get("object")


def _series_grouped(records: list, summaries: list) -> list:
    """The records in order, as dicts, except those of a time series: each summary over time stands,
    as (summary, its records), where its first time point was; summaries without records come last."""
    entries = [(summary, []) for summary in summaries]
    by_key: dict = {}
    for entry in entries:
        by_key.setdefault(_series_key(entry[0]), entry)
    items, placed = [], set()
    for record in records:
        entry = by_key.get(_series_key(record))
        if entry is None or record.get("frame") not in entry[0]["frames"]:
            items.append(record)
            continue
        entry[1].append(record)
        if id(entry) not in placed:
            placed.add(id(entry))
            items.append(entry)
    return items + [entry for entry in entries if id(entry) not in placed]


def _after_r(record: dict) -> str:
    after = record["after"]
    r, interval = after.get("pearson_noise_corrected"), after.get("pearson_noise_corrected_interval")
    if r is None:
        return "undefined"
    return fixed(r, 3) + (f" <span class='small'>[{fixed(interval[0], 3)}, {fixed(interval[1], 3)}]</span>"
                          if interval else " <span class='small'>(no interval)</span>")


def _span(values) -> str:
    """The range of some numbers (None for undefined ones) as text."""
    values = [v for v in values if v is not None]
    if not values:
        return "undefined"
    low, high = min(values), max(values)
    return fixed(low, 3) if low == high else f"{fixed(low, 3)} to {fixed(high, 3)}"


def _series_where(summary: dict, records: list) -> str:
    where = _where({key: summary.get(key) for key in ("image", "object")})
    planes = {len(r["plane_profile"]) for r in records if r.get("plane_profile")}
    return ", ".join(filter(None, [where, f"{len(summary['frames'])} time points"]
                            + ([f"each 3-D, {max(planes)} planes"] if planes else [])))


def _series_flags(summary: dict) -> list[str]:
    """The bleaching and unmixing-fit checks of a series in words, flagged ones first."""
    limit = summary["bleach_limit"]
    flagged, fine = [], []
    for label, bleaching in summary["bleaching"].items():
        fall = bleaching.get("fall")
        if bleaching["flagged"]:
            flagged.append(f"{label} loses {100 * fall:.0f} % of its signal from the first to the last time point "
                           f"(more than {100 * limit:.0f} %): bleaching or drift; the corrected r resolves less as "
                           "the signal falls" if fall is not None else f"{label}: bleaching flagged")
        elif fall is not None:
            fine.append(f"{label} changes by {-100 * fall:+.0f} % over the series (within the {100 * limit:.0f} % "
                        "bleaching limit)")
    residual = summary["residual"]
    ratios = [r for r in residual["ratio"] if r is not None]
    if residual["flagged"]:
        flagged.append(residual["note"] or "the unmixing residual grows over time: the matrix no longer fits")
    elif ratios:
        fine.append(f"the unmixing residual stays at {_span(ratios)} times what detector noise leaves: the matrix "
                    "fits throughout")
    elif residual["note"]:
        fine.append(residual["note"])
    return [f"⚠ {text}" for text in flagged] + fine


def _answer(matrix: BleedThroughMatrix, items: list, comparison) -> str:
    parts = ["<h2>The answer</h2>"]
    if items:
        several_images = len({_where(i) if isinstance(i, dict) else _series_key(i[0]) for i in items}) > 1 or any(
            isinstance(i, tuple) or i.get("plane_profile") for i in items)
        rows = []
        for item in items:
            if isinstance(item, tuple):
                rows.append(_series_answer(*item))
                continue
            record = item
            pair = f"{_e(record['pair'][0])} and {_e(record['pair'][1])}"
            before = record["before"].get("pearson")
            rows.append([verdict_badge(record["verdict"], "<br>"),
                         pair + (f"<br><span class='small'>{_e(_where(record))}</span>" if several_images else ""),
                         "undefined" if before is None else fixed(before, 3),
                         _after_r(record),
                         _e(VERDICTS[record["verdict"]][0].upper() + VERDICTS[record["verdict"]][1:]) + "."])
        parts.append(_table(["verdict", "pair", "r before (raw channels)", "r after unmixing [95 %]", "what it means"],
                            rows, "answer"))
        parts.append("<p class='small'>r after unmixing: Pearson r of the unmixed labels with the noise of unmixing "
                     "subtracted, and its 95 % interval (detector noise and the matrix's uncertainty; it covers this "
                     "region as imaged, not the variation between cells or specimens). Details per pair below.</p>")
    else:
        parts.append("<p>No colocalization results were given (<code>--coloc</code>): this report covers the "
                     "matrix.</p>")
    parts.append(f"<p>{_e(_matrix_headline(matrix))}</p>")
    if comparison is not None:
        parts.append(f"<p>Measured versus predicted: {_e(comparison.summary)}</p>")
    return "\n".join(parts)


def _matrix_headline(matrix: BleedThroughMatrix) -> str:
    """The matrix in one sentence: where it comes from, its largest leak, its worst noise penalty."""
    values = np.array(matrix.matrix, dtype=float)
    for k, label in enumerate(matrix.labels):
        values[matrix.channels.index(matrix.primary[label]), k] = -np.inf
    c, k = np.unravel_index(int(np.argmax(values)), values.shape)
    penalty = matrix.noise_penalty()
    worst = int(np.argmax(penalty))
    if matrix.kind == "measured":
        fields = sum(int(entry.get("fields", 0)) for entry in (matrix.qc.get("labels") or {}).values()
                     if isinstance(entry, dict))
        origin = f"Matrix measured from {fields} control fields" if fields else "Matrix measured from controls"
    else:
        origin = "Matrix predicted from the optics (not measured)"
    leak = (f"the largest leak is {matrix.labels[k]} into {matrix.channels[c]}, {fixed(matrix.matrix[c, k], 3)} of "
            f"its primary signal" if len(matrix.channels) > 1 else "one channel, no leak")
    return (f"{origin}: {leak}; unmixing multiplies the noise variance by at most "
            f"{penalty[worst]:.2f} ({matrix.labels[worst]}).")


def _series_answer(summary: dict, records: list) -> list:
    """The answer's row for a time series: its verdicts counted, the range of its r's, its checks."""
    n = len(summary["frames"])
    counts = sorted(summary["verdicts"].items(), key=lambda item: -item[1])
    badges = "<br>".join(f"{verdict_badge(v, ' ')} <span class='small'>{count} of {n}</span>" for v, count in counts)
    pair = f"{_e(summary['pair'][0])} and {_e(summary['pair'][1])}"
    flagged = [f"{label} loses {100 * b['fall']:.0f} % of its signal" if b.get("fall") is not None
               else f"{label} bleaches" for label, b in summary["bleaching"].items() if b["flagged"]]
    if summary["residual"]["flagged"]:
        flagged.append("the unmixing residual grows: the matrix no longer fits")
    checks = f"Flagged: {'; '.join(flagged)}." if flagged else "No check flagged."
    meaning = _e(f"A verdict per time point (details under Time series). {checks}")
    return [badges or "-", pair + f"<br><span class='small'>{_e(_series_where(summary, records))}</span>",
            _span([r["before"].get("pearson") for r in records]),
            _span(summary["pearson_noise_corrected"]) + " <span class='small'>(per time point)</span>", meaning]


def _problems(matrix: BleedThroughMatrix, records: list, summaries: list) -> str:
    problems = [*(matrix.qc.get("flags", []) if isinstance(matrix.qc, dict) else []), *matrix_warnings(matrix)]
    for summary in summaries:
        where = _where({key: summary.get(key) for key in ("image", "object")})
        problems += [f"{summary['pair'][0]} and {summary['pair'][1]}" + (f" ({where})" if where else "") + f": {note}"
                     for note in summary.get("notes", [])]
    for record in records:
        trend = record.get("depth_trend") or {}
        notes = [n for n in (record["before"].get("note"), record["after"].get("note"),
                             trend.get("note") if trend.get("flagged") else None) if n]
        for note in notes:
            problems.append(f"{record['pair'][0]} and {record['pair'][1]}"
                            + (f" ({_where(record)})" if _where(record) else "") + f": {note}")
        if record.get("saturated_pixels"):
            problems.append(f"{record['pair'][0]} and {record['pair'][1]}: {record['saturated_pixels']} saturated "
                            "pixels left out")
    problems = list(dict.fromkeys(problems))
    if not problems:
        return "<h2>QC problems</h2><p class='fine'>None found: every check of the controls and the matrix passed.</p>"
    return ("<h2>QC problems</h2><div class='problems'><ul>" + "".join(f"<li>⚠ {_e(p)}</li>" for p in problems)
            + "</ul></div>")


# --- the sample -------------------------------------------------------------------------

def _sample(path, matrix: BleedThroughMatrix) -> str:
    from ..coloc.verdict import NoiseModel, prepare_image
    from ..io.images import read_image
    from .plots import sample_figure

    image = read_image(path, lazy=True)
    missing = [c for c in matrix.channels if c not in image.channel_names]
    if missing:
        raise InputError(f"--sample {path}: lacks channels {missing} of the matrix (it has "
                         f"{list(image.channel_names)}); give the raw image the matrix applies to")
    image = image.select_channels(matrix.channels)
    key, which = [], []
    for axis, size in zip(image.axes, image.data.shape):
        if axis in "TZ":
            key.append(size // 2 if axis == "Z" else 0)
            which.append(f"{axis.lower()} {key[-1] + 1} of {size}")
        else:
            key.append(slice(None))
    plane = np.asarray(image.data[tuple(key)])
    # Pictures need no noise model: none is estimated for them.
    silent = NoiseModel(np.zeros(len(matrix.channels)), np.zeros(len(matrix.channels)), "image")
    prepared = prepare_image(plane, matrix, matrix_draws=0, noise=silent)
    first = prepared.plane(0)
    caption = (f"{Path(str(path)).name}" + (f" ({', '.join(which)})" if which else "")
               + ": each label's primary channel, background subtracted (top), and the label after unmixing "
                 "(non-negative least squares, bottom), on one display range per label; what unmixing removed "
                 "from a channel is what darkens.")
    figure = sample_figure(first.signal, prepared.nonnegative(0, first), matrix)
    return f"<p class='small'>{_e(caption)}</p><img alt='raw and unmixed thumbnails of {_e(path)}' src='{_png(figure)}'>"


# --- each pair ------------------------------------------------------------------------------

def _coloc_section(record: dict) -> str:
    pair = record["pair"]
    heading = f"{pair[0]} and {pair[1]}" + (f", {_where(record)}" if _where(record) else "")
    notes: dict[str, int] = {}

    def mark(name: str) -> str:
        number = notes.setdefault(name, len(notes) + 1)
        return f"<sup>{number}</sup>"

    def cell(side: str, key: str) -> str:
        value = record[side].get(key)
        text = _number(value)
        if key.startswith("manders") and isinstance(value, float) and value == 1.0:
            text += mark("manders one")
        return text

    rows = []
    for family, keys in _FAMILIES:
        for key, name in keys:
            rows.append([f"<span class='small'>{_e(family)}:</span> {_e(name)}", cell("before", key),
                         cell("after", key)])
    thresholds = []
    for side in ("before", "after"):
        values = record[side].get("thresholds")
        if not values:
            thresholds.append("-")
            continue
        text = ", ".join(fixed(t, 1) for t in values)
        thresholds.append(_e(text) + (mark("negative threshold") if min(values) < 0 else ""))
    methods = {record[s].get("threshold_method", "") for s in ("before", "after")} - {""}
    rows.append([f"thresholds (A, B; {_e(' / '.join(sorted(methods)))})", *thresholds])
    rows.append(["pixels", _e(record["before"].get("n_pixels", "")), _e(record["after"].get("n_pixels", ""))])
    text = [f"<h3>{_e(heading)}</h3>", f"<p>{verdict_badge(record['verdict'])} {_e(VERDICTS[record['verdict']])}.</p>"]
    if record.get("plane_profile"):
        text.append(_stack_part(record))
    text.append(_table(["coefficient", "before (primary channels)", "after (least-squares abundances)"], rows))
    if notes:
        text.append("<ol class='small'>" + "".join(f"<li>{_e(FOOTNOTES[name])}</li>" for name in notes) + "</ol>")
    after = record["after"]
    interval = after.get("pearson_noise_corrected_interval")
    details = []
    if after.get("pearson_noise_corrected") is not None:
        details.append(f"after-r corrected for the noise of unmixing: {fixed(after['pearson_noise_corrected'], 3)}"
                       + (f", 95 % interval {fixed(interval[0], 3)} to {fixed(interval[1], 3)} (detector noise, the "
                          "matrix's measurement uncertainty and the noise model's; it covers this region as imaged, "
                          "not how r varies between cells or specimens)" if interval else ""))
    if record.get("inflation") is not None:
        details.append(f"before-r minus corrected after-r (how much the raw channels overstate it): "
                       f"{fixed(record['inflation'], 3)}")
    if record.get("reason"):
        details.append(f"why: {record['reason']}")
    nonnegative = record.get("after_nonnegative") or {}
    if nonnegative.get("pearson") is not None:
        details.append(f"plain Pearson r of the non-negative abundances (the unmixed images): "
                       f"{fixed(nonnegative['pearson'], 3)}; not used for the verdict (clipping at 0 biases it)")
    if record.get("noise_model"):
        details.append(f"detector noise model from: {record['noise_model']}; matrix uncertainty: "
                       f"{record.get('matrix_uncertainty', 'not recorded')}")
    details.append(f"saturated pixels excluded: {record.get('saturated_pixels', 0)}; flat-field: "
                   f"{record.get('flat_field', 'none')}")
    text.append("<ul>" + "".join(f"<li>{_e(d)}</li>" for d in details) + "</ul>")
    histogram = record.get("histogram")
    if histogram:
        uri = _png_file(Path(histogram))
        if uri:
            text.append(f"<img alt='2-D histograms of {_e(pair[0])} and {_e(pair[1])}' src='{uri}'>")
    return "\n".join(text)


def _stack_part(record: dict) -> str:
    """A z-stack's verdict: over which voxels, each plane's r and the trend with depth."""
    from .plots import depth_profile_figure

    profile = record["plane_profile"]
    first, last = record.get("planes") or (0, len(profile) - 1)
    step = record.get("z_step_um")
    voxels = record["after"].get("n_pixels") or record.get("pixels")
    where = Path(str(record["image"])).name if record.get("image") else "the stack"
    words = (f"This verdict is over voxels, in 3-D: {len(profile)} planes (planes {first} to {last} of {where}), "
             + (f"Z step {step:g} µm" if step else "Z step not in the image's metadata (depths in planes)")
             + (f", {voxels:,} voxels" if isinstance(voxels, int) else "") + "; never a projection.")
    trend = record.get("depth_trend") or {}
    slope = trend.get("slope_per_plane")
    if slope is None:
        depth = f"Depth trend of the corrected r: none ({trend.get('note') or 'not measured'})."
    else:
        interval = trend.get("interval")
        per_um = trend.get("slope_per_um")
        depth = (f"Depth trend of the corrected r: {fixed(slope, 4)} per plane"
                 + (f" ({fixed(per_um, 4)} per µm)" if per_um is not None else "")
                 + (f", 95 % interval {fixed(interval[0], 4)} to {fixed(interval[1], 4)}" if interval else "")
                 + (f": flagged, {trend['note']}." if trend.get("flagged") else
                    ": not flagged (a trend is flagged when its interval excludes 0 and it changes r by 0.1 or more "
                    "over the stack)."))
    figure = depth_profile_figure(record)
    return (f"<p><b>{_e(words)}</b></p><p class='caution small'>{_e(PROJECTION_CAUTION)}</p>"
            f"<img alt='r by depth, {_e(record['pair'][0])} and {_e(record['pair'][1])}' src='{_png(figure)}'>"
            f"<p>{_e(depth)}</p>")


# --- time series ------------------------------------------------------------------------------

def _time_section(summary: dict, records: list) -> str:
    """A time series: its verdicts counted, the r and the signals over time, the checks in words, and
    the verdict of each time point."""
    from .plots import time_figure

    pair = summary["pair"]
    n = len(summary["frames"])
    counts = sorted(summary["verdicts"].items(), key=lambda item: -item[1])
    text = [f"<h3>{_e(pair[0])} and {_e(pair[1])} over time, {_e(_series_where(summary, records))}</h3>",
            "<p>Verdicts per time point: " + ", ".join(f"{verdict_badge(v)} at {count} of {n}" for v, count in counts)
            + ".</p>"]
    if any(r.get("plane_profile") for r in records):
        text.append(f"<p class='small'>Each time point is judged in 3-D, over its voxels. {_e(PROJECTION_CAUTION)}</p>")
    text.append(f"<img alt='{_e(pair[0])} and {_e(pair[1])} over time' src='{_png(time_figure(summary))}'>")
    text.append("<ul>" + "".join(f"<li>{_e(line)}</li>" for line in _series_flags(summary)) + "</ul>")
    by_frame = {r["frame"]: r for r in records}
    rows = []
    for index, frame in enumerate(summary["frames"]):
        record = by_frame.get(frame)
        corrected, interval = summary["pearson_noise_corrected"][index], summary["intervals"][index]
        after = "undefined" if corrected is None else fixed(corrected, 3) + (
            f" [{fixed(interval[0], 3)}, {fixed(interval[1], 3)}]" if interval else "")
        if record is None:
            rows.append([_e(frame), "-", "-", after, ""])
            continue
        before = record["before"].get("pearson")
        rows.append([_e(frame), f"<code class='verdict'>{_e(record['verdict'])}</code>",
                     "undefined" if before is None else fixed(before, 3), after,
                     f"<span class='small'>{_e(record.get('reason') or '')}</span>"])
    text.append(_table(["time point", "verdict", "r before", "r after, noise-corrected [95 %]", "why"], rows,
                       "series"))
    return "\n".join(text)


# --- the matrix and its QC -------------------------------------------------------------------

def _matrix_section(matrix: BleedThroughMatrix) -> str:
    from .summary import matrix_rows

    parts = ["<h2>Bleed-through matrix</h2>",
             f"<p>{_e(matrix.kind.capitalize())}: signal of each label (column) in each channel (row), relative to "
             "its primary channel" + (", with 95 % intervals" if matrix.ci95_low is not None else "") + ".</p>",
             _table(["channel \\ label", *matrix.labels], [[_e(cell) for cell in row] for row in matrix_rows(matrix)])]
    penalty = matrix.noise_penalty()
    parts.append(f"<p>Condition number {matrix.condition_number():.2f}. Noise penalty (factor on the noise "
                 "variance of each unmixed label): " + ", ".join(f"{_e(label)} {p:.2f}"
                                                               for label, p in zip(matrix.labels, penalty)) + ".</p>")
    if matrix.background is not None:
        parts.append(f"<p>Background ({_e(matrix.background_source)}): " + ", ".join(
            f"{_e(c)} {b:.1f}" for c, b in zip(matrix.channels, matrix.background)) + ".</p>")
    parts.append(_qc_table(matrix))
    return "\n".join(parts)


# Which QC column a measurement flag belongs to, by a word of its text.
_FLAG_COLUMNS = (("slope differs", "linearity"), ("shifted", "registration"), ("saturated", "usable"))


def _qc_table(matrix: BleedThroughMatrix) -> str:
    """One row per off-primary coefficient: the figures behind it, each problem flagged in its row.

    Measurement flags are written "LABEL in CHANNEL: ..." (one coefficient) or "LABEL: ..." (the
    whole control); each is shown in the row it names, beside the figure it is about.
    """
    qc = matrix.qc if isinstance(matrix.qc, dict) else {}
    per_label = qc.get("labels") or {}
    if matrix.kind != "measured" or not per_label:
        return "<h3>Quality of the controls</h3><p>No QC: this matrix was not measured from controls.</p>"
    flags = list(qc.get("flags", []))
    placed = set()
    penalty = matrix.noise_penalty()

    def grid(name, c, k):
        values = qc.get(name)
        try:
            value = values[c][k]
        except (TypeError, IndexError):
            return None
        return value if isinstance(value, (int, float)) and np.isfinite(value) else None

    rows = []
    for k, label in enumerate(matrix.labels):
        info = per_label.get(label, {})
        primary = matrix.channels.index(matrix.primary[label])
        channels = [c for c in range(len(matrix.channels)) if c != primary]
        label_flags = [f for f in flags if f.startswith(f"{label}: ")]
        for i, c in enumerate(channels):
            channel = matrix.channels[c]
            row_flags = [f for f in flags if f.startswith(f"{label} in {channel}: ")] + (label_flags if i == 0 else [])
            placed.update(row_flags)
            columns = {column for f in row_flags for word, column in _FLAG_COLUMNS if word in f}

            def flagged(text, column):
                return f"⚠ {text}" if column in columns else text

            cells = []
            if i == 0:
                span = f" rowspan='{len(channels)}'"
                fields = info.get("fields", "")
                cells += [f"<td class='text'{span}>{_e(label)}<br><span class='small'>primary "
                          f"{_e(matrix.primary[label])}</span></td>", f"<td{span}>{_e(fields)}</td>",
                          f"<td{span}>{flagged(_e(info.get('usable_pixels', '')), 'usable')}</td>",
                          f"<td{span}>{penalty[k]:.2f}</td>"]
            r2, intercept = grid("r_squared", c, k), grid("intercept", c, k)
            dim, bright = grid("slope_dim", c, k), grid("slope_bright", c, k)
            shift, spread = grid("registration_shift_px", c, k), grid("between_field_sd", c, k)
            coefficient = fixed(matrix.matrix[c, k])
            if matrix.ci95_low is not None:
                coefficient += f" [{fixed(matrix.ci95_low[c, k])}, {fixed(matrix.ci95_high[c, k])}]"
            cells += [f"<td class='text'>{_e(channel)}</td>", f"<td>{coefficient}</td>",
                      f"<td>{'-' if r2 is None else fixed(r2, 3)}</td>",
                      f"<td>{'-' if intercept is None else fixed(intercept, 2)}</td>",
                      f"<td>{flagged('-' if dim is None or bright is None else f'{fixed(dim)} / {fixed(bright)}', 'linearity')}</td>",
                      f"<td>{flagged('-' if shift is None else fixed(shift, 2), 'registration')}</td>",
                      f"<td>{'-' if spread is None else fixed(spread)}</td>",
                      f"<td class='flag'>{'<br>'.join('⚠ ' + _e(f.split(': ', 1)[1]) for f in row_flags)}</td>"]
            rows.append(f"<tr{' class=flagged' if row_flags else ''}>" + "".join(cells) + "</tr>")
    header = ["label", "fields", "usable pixels", "noise penalty", "leak into", "coefficient [95 %]", "R²",
              "intercept", "slope dim / bright half", "registration shift (px)", "between-field SD", "problems"]
    table = ("<table><thead><tr>" + "".join(f"<th>{_e(h)}</th>" for h in header) + "</tr></thead><tbody>"
             + "".join(rows) + "</tbody></table>")
    notes = ["R²: share of the channel's variance the line explains; intercept: offset at zero primary signal, "
             "near 0 after good background subtraction; slopes over the dim and the bright half of the pixels differ "
             "when the detector is non-linear; registration shift: of the channel against the primary, measured "
             "where the leak is large enough (-: too small); between-field SD: needs at least 3 fields (-: fewer)."]
    unplaced = [f for f in flags if f not in placed]
    text = "<h3>Quality of the controls</h3>" + table + f"<p class='small'>{_e(notes[0])}</p>"
    if unplaced:
        text += "<ul>" + "".join(f"<li>⚠ {_e(f)}</li>" for f in unplaced) + "</ul>"
    return text


def _comparison_section(matrix, predicted, comparison) -> str:
    from ..optics.comparison import CAUSES, aligned_prediction
    from .plots import comparison_figure, matrices_figure
    from .summary import comparison_rows

    header, *rows = comparison_rows(comparison)
    parts = ["<h2>Measured versus predicted</h2>",
             f"<img alt='measured and predicted matrices' src='{_png(matrices_figure(matrix, aligned_prediction(matrix, predicted, 'report')))}'>",
             _table(header, [[_e(cell) for cell in row[:-1]] + [f"<code class='verdict'>{_e(row[-1])}</code>"]
                             for row in rows]),
             f"<p>{_e(comparison.summary)}</p>",
             "<ul>" + "".join(f"<li><code class='verdict'>{_e(v)}</code>: {_e(text)}</li>"
                              for v, text in CAUSES.items()) + "</ul>",
             f"<img alt='measured against predicted' src='{_png(comparison_figure(comparison))}'>"]
    return "\n".join(parts)


# --- inputs --------------------------------------------------------------------------------------

def _inputs(matrix, matrix_path, predicted_path, description_path, records, samples, software) -> str:
    from ..io import provenance

    def checksum(path) -> str:
        try:
            return _e(provenance.sha256_path(path))
        except OSError:
            return "(not found)"

    rows = []
    for role, path in (("measured matrix" if matrix.kind == "measured" else "matrix", matrix_path),
                       ("predicted matrix", predicted_path), ("optics description", description_path)):
        if path is not None:
            rows.append([_e(role), _e(path), checksum(path)])
    images = dict.fromkeys([str(p) for p in samples] + [str(r["image"]) for r in records if r.get("image")])
    for image in images:
        rows.append(["sample", _e(image), checksum(image)])
    for source in dict.fromkeys(r.get("source") for r in records if r.get("source")):
        rows.append([f"colocalization results (matrix {_e(matrix.sha256()[:12])})", _e(source), checksum(source)])
    entries = matrix.provenance.get("inputs")
    for entry in entries if isinstance(entries, list) else []:
        if isinstance(entry, dict):
            role = entry.get("role", "")
            rows.append([_e(f"{role} of {entry['label']}" if entry.get("label") else role), _e(entry.get("name", "")),
                         _e(entry.get("sha256", ""))])
    return ("<h2>Inputs and checksums</h2>" + _table(["role", "file", "SHA-256"], rows, "inputs")
            + f"<p class='small'>unmix {_e(software['unmix'])}, Python {_e(software['python'])}, numpy "
              f"{_e(software['numpy'])}, scipy {_e(software['scipy'])}.</p>")


def write_report(path, html_text: str) -> Path:
    from ..io.atomic import write_text_atomic

    write_text_atomic(path, html_text)
    return Path(path)
