"""The QC report: one self-contained HTML file for a collaborator or a reviewer.

Everything is inside the file: figures are PNG data URIs, styles are inline,
nothing is loaded from the network (references are plain links). Every name
that comes from a user's file (labels, channels, paths) is HTML-escaped. A
PDF is not made: no well-kept library renders this HTML to PDF without a
browser; print the page from a browser when a PDF is needed.
"""

from __future__ import annotations

import base64
import html
import io
from pathlib import Path

import numpy as np

from ..matrix import BleedThroughMatrix
from ..coloc.verdict import VERDICTS

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
)

_STYLE = """
body { font-family: sans-serif; max-width: 1100px; margin: 2em auto; color: #222; line-height: 1.4; }
h1 { font-size: 1.6em; } h2 { border-bottom: 1px solid #ccc; padding-bottom: .2em; margin-top: 1.6em; }
table { border-collapse: collapse; margin: .6em 0; font-size: .92em; }
th, td { border: 1px solid #bbb; padding: .25em .55em; text-align: right; }
th:first-child, td:first-child { text-align: left; }
code.verdict { font-weight: bold; padding: .1em .35em; border-radius: .2em; border: 1px solid #777; }
.caution { background: #fff7e0; border-left: 4px solid #e0a000; padding: .5em 1em; }
img { max-width: 100%; border: 1px solid #ddd; margin: .4em 0; }
.small { font-size: .85em; color: #555; }
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
    return f"{value:.{digits}f}" if isinstance(value, (int, float)) and np.isfinite(value) else _e(value)


def _table(header, rows) -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{cell}</td>" for cell in row) + "</tr>" for row in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def load_coloc_results(path) -> list[dict]:
    """The checked records of a coloc JSON file (see :func:`unmix.coloc.records.load_records`)."""
    from ..coloc.records import load_records

    return load_records(path)


def build_report(matrix: BleedThroughMatrix, *, matrix_path=None, predicted: BleedThroughMatrix | None = None,
                 predicted_path=None, coloc_records=(), title: str = "Bleed-through and colocalization report") -> str:
    """The report as one HTML string."""
    from ..io import provenance
    from .plots import comparison_figure, matrices_figure

    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>{_e(title)}</title>"
             f"<style>{_STYLE}</style></head><body>", f"<h1>{_e(title)}</h1>"]
    software = provenance.software()
    parts.append(f"<p class='small'>unmix {_e(software['unmix'])} (Python {_e(software['python'])}, numpy "
                 f"{_e(software['numpy'])}, scipy {_e(software['scipy'])}); made {_e(provenance.utc_now())}.</p>")

    parts.append("<h2>Cautions</h2><div class='caution'><ul>"
                 + "".join(f"<li>{_e(c)}</li>" for c in CAUTIONS) + "</ul></div>")

    # Inputs
    rows = []
    for role, path in (("measured matrix", matrix_path), ("predicted matrix", predicted_path)):
        if path is not None:
            rows.append([_e(role), _e(path), _e(provenance.sha256_path(path))])
    for source in dict.fromkeys(r.get("source") for r in coloc_records if r.get("source")):
        rows.append(["colocalization results", _e(source), _e(provenance.sha256_path(source))])
    for entry in matrix.provenance.get("inputs", []) if isinstance(matrix.provenance.get("inputs"), list) else []:
        if isinstance(entry, dict):
            role = entry.get("role", "")
            rows.append([_e(f"{role} of {entry['label']}" if entry.get("label") else role), _e(entry.get("name", "")),
                         _e(entry.get("sha256", ""))])
    parts.append("<h2>Inputs</h2>" + _table(["role", "file", "SHA-256"], rows))

    # The matrix
    parts.append("<h2>Bleed-through matrix</h2>")
    parts.append(f"<p>{_e(matrix.kind.capitalize())}: signal of each label (column) in each channel (row), "
                 "relative to its primary channel" + (", with 95 % intervals" if matrix.ci95_low is not None else "")
                 + ".</p>")
    from .summary import matrix_rows

    rows = [[_e(cell) for cell in row] for row in matrix_rows(matrix)]
    parts.append(_table(["channel \\ label", *matrix.labels], rows))
    penalty = matrix.noise_penalty()
    parts.append(f"<p>Condition number {matrix.condition_number():.2f}. Noise penalty (factor on the noise "
                 "variance of each unmixed label): " + ", ".join(f"{_e(label)} {p:.2f}"
                                                               for label, p in zip(matrix.labels, penalty)) + ".</p>")
    if matrix.background is not None:
        parts.append(f"<p>Background ({_e(matrix.background_source)}): " + ", ".join(
            f"{_e(c)} {b:.1f}" for c, b in zip(matrix.channels, matrix.background)) + ".</p>")
    flags = matrix.qc.get("flags", []) if isinstance(matrix.qc, dict) else []
    if flags:
        parts.append("<p>Quality checks:</p><ul>" + "".join(f"<li>{_e(f)}</li>" for f in flags) + "</ul>")

    # Measured versus predicted
    if predicted is not None:
        from ..optics.comparison import CAUSES, aligned_prediction, compare

        comparison = compare(matrix, predicted, where=str(predicted_path or "predicted"))
        parts.append("<h2>Measured versus predicted</h2>")
        parts.append(f"<img alt='measured and predicted matrices' src='{_png(matrices_figure(matrix, aligned_prediction(matrix, predicted, 'report')))}'>")
        rows = [[_e(r["channel"]), _e(r["label"]), _number(r["measured"]),
                 f"[{r['ci95'][0]:.4f}, {r['ci95'][1]:.4f}]", _number(r["predicted"]),
                 _number(r["ratio"], 2) if r["ratio"] is not None else "-",
                 f"<code class='verdict'>{_e(r['verdict'])}</code>"] for r in comparison.coefficients]
        parts.append(_table(["channel", "label", "measured", "95 % interval", "predicted", "ratio", "verdict"], rows))
        parts.append(f"<p>{_e(comparison.summary)}</p>")
        parts.append("<ul>" + "".join(f"<li><code class='verdict'>{_e(v)}</code>: {_e(text)}</li>"
                                      for v, text in CAUSES.items()) + "</ul>")
        parts.append(f"<img alt='measured against predicted' src='{_png(comparison_figure(comparison))}'>")

    # Colocalization
    if coloc_records:
        parts.append("<h2>Colocalization before and after unmixing</h2>")
        parts.append("<p>Verdicts, on Pearson r (overlap = r at least the minimum and the randomisation p below "
                     "alpha):</p><ul>" + "".join(f"<li><code class='verdict'>{_e(v)}</code>: {_e(text)}</li>"
                                                  for v, text in VERDICTS.items()) + "</ul>")
        for record in coloc_records:
            parts.append(_coloc_section(record))

    parts.append("<h2>References</h2><ul>" + "".join(
        f"<li>{_e(text)}" + (f" (<a href='{_e(url)}'>link</a>)" if url else "") + "</li>" for text, url in REFERENCES)
        + "</ul></body></html>")
    return "\n".join(parts)


def _coloc_section(record: dict) -> str:
    pair = record["pair"]
    where = record.get("image", "")
    heading = f"{pair[0]} and {pair[1]}" + (f", {Path(str(where)).name}" if where else "") + (
        f", object {record['object']}" if record.get("object") is not None else "")
    # Grouped by family: correlation, co-occurrence, significance.
    keys = [("pearson", "correlation: Pearson r"), ("spearman", "correlation: Spearman rho"),
            ("icq", "correlation: Li's ICQ"), ("overlap", "co-occurrence: Manders overlap"),
            ("manders_m1", "co-occurrence: Manders M1"), ("manders_m2", "co-occurrence: Manders M2"),
            ("m1_above_own_threshold", "co-occurrence: M1 above own threshold (Costes)"),
            ("m2_above_own_threshold", "co-occurrence: M2 above own threshold (Costes)"),
            ("p_value", "significance: p (randomisation)"), ("n_pixels", "pixels")]
    rows = [[_e(name), _number(record["before"].get(key)) if key != "n_pixels" else _e(record["before"].get(key)),
             _number(record["after"].get(key)) if key != "n_pixels" else _e(record["after"].get(key))]
            for key, name in keys]
    thresholds = [record[s].get("thresholds") for s in ("before", "after")]
    rows.append(["thresholds (" + _e(record["before"].get("threshold_method", "")) + ")",
                 *(_e(", ".join(f"{t:.1f}" for t in th)) if th else "-" for th in thresholds)])
    text = [f"<h3>{_e(heading)}</h3>",
            f"<p>Verdict: <code class='verdict'>{_e(record['verdict'])}</code>: {_e(VERDICTS[record['verdict']])}.</p>",
            _table(["coefficient", "before (primary channels)", "after (least-squares abundances)"], rows)]
    after = record["after"]
    interval = after.get("pearson_noise_corrected_interval")
    details = []
    if after.get("pearson_noise_corrected") is not None:
        details.append(f"after-r corrected for the noise of unmixing: {after['pearson_noise_corrected']:.3f}"
                       + (f", 95 % interval {interval[0]:.3f} to {interval[1]:.3f} (detector noise, the matrix's "
                          "measurement uncertainty and the noise model's; it covers this region as imaged, not "
                          "how r varies between cells or specimens)" if interval else ""))
    if record.get("inflation") is not None:
        details.append(f"before-r minus corrected after-r (how much the raw channels overstate it): "
                       f"{record['inflation']:.3f}")
    if record.get("reason"):
        details.append(f"why: {record['reason']}")
    nonnegative = record.get("after_nonnegative") or {}
    if nonnegative.get("pearson") is not None:
        details.append(f"plain Pearson r of the non-negative abundances (the unmixed images): "
                       f"{nonnegative['pearson']:.3f}; not used for the verdict (clipping at 0 biases it)")
    if record.get("noise_model"):
        details.append(f"detector noise model from: {record['noise_model']}; matrix uncertainty: "
                       f"{record.get('matrix_uncertainty', 'not recorded')}")
    details.append(f"saturated pixels excluded: {record.get('saturated_pixels', 0)}; flat-field: "
                   f"{record.get('flat_field', 'none')}")
    notes = [n for n in (record["before"].get("note"), record["after"].get("note")) if n]
    text.append("<ul>" + "".join(f"<li>{_e(d)}</li>" for d in details + notes) + "</ul>")
    histogram = record.get("histogram")
    if histogram:
        uri = _png_file(Path(histogram))
        if uri:
            text.append(f"<img alt='2-D histograms of {_e(pair[0])} and {_e(pair[1])}' src='{uri}'>")
    return "\n".join(text)


def write_report(path, html_text: str) -> Path:
    from ..io.atomic import write_text_atomic

    write_text_atomic(path, html_text)
    return Path(path)
