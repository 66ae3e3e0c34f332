"""Plain-text summaries for the terminal."""

from __future__ import annotations

from ..matrix import BleedThroughMatrix


def table(rows: list[list[str]]) -> str:
    """Columns aligned, first left and the rest right, a rule under the header row."""
    widths = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    lines = ["  ".join(cell.ljust(w) if i == 0 else cell.rjust(w) for i, (cell, w) in enumerate(zip(row, widths)))
             for row in rows]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def fixed(value: float, digits: int = 4) -> str:
    """`value` with `digits` decimals; a value that rounds to zero prints as 0 (never -0.0000)."""
    text = f"{value:.{digits}f}"
    return "0" if float(text) == 0 else text


def matrix_rows(matrix: BleedThroughMatrix) -> list[list[str]]:
    """One row per channel: its name, then each label's coefficient with its 95 % interval."""
    rows = []
    for c, channel in enumerate(matrix.channels):
        cells = [channel]
        for k, label in enumerate(matrix.labels):
            value = matrix.matrix[c, k]
            if matrix.primary[label] == channel:
                cells.append("1 (primary)")
            elif matrix.ci95_low is not None:
                cells.append(f"{fixed(value)} [{fixed(matrix.ci95_low[c, k])}, {fixed(matrix.ci95_high[c, k])}]")
            else:
                cells.append(fixed(value))
        rows.append(cells)
    return rows


def comparison_rows(comparison) -> list[list[str]]:
    """Measured versus predicted: a header row, then one row per off-primary coefficient."""
    rows = [["channel", "label", "measured [95 %]", "predicted", "ratio", "verdict"]]
    for r in comparison.coefficients:
        rows.append([r["channel"], r["label"], f"{fixed(r['measured'])} [{fixed(r['ci95'][0])}, {fixed(r['ci95'][1])}]",
                     fixed(r["predicted"]), "-" if r["ratio"] is None else f"{r['ratio']:.2f}", r["verdict"]])
    return rows


def matrix_summary(matrix: BleedThroughMatrix, flags: bool = True) -> str:
    """The matrix with its 95 % intervals, per-label counts and (with `flags`) its QC flags.

    Measuring emits each flag as a warning already: right after a measurement, pass
    ``flags=False`` so that each is said once.
    """
    rows = [["channel \\ label", *matrix.labels], *matrix_rows(matrix)]
    parts = [f"Bleed-through matrix ({matrix.kind}; signal in channel / signal in primary channel"
             + (", 95 % interval)" if matrix.ci95_low is not None else ")"), table(rows)]
    per_label = matrix.qc.get("labels", {})
    if per_label:
        rows = [["label", "primary", "fields", "usable pixels", "saturated in primary"]]
        for label in matrix.labels:
            info = per_label.get(label, {})
            fraction = info.get("primary_saturated_fraction")
            rows.append([label, matrix.primary[label], str(info.get("fields", "")),
                         str(info.get("usable_pixels", "")),
                         "" if fraction is None else f"{100 * fraction:.2f} %"])
        parts += ["", table(rows)]
    if matrix.background is not None:
        levels = ", ".join(f"{c} {b:.1f}" for c, b in zip(matrix.channels, matrix.background))
        parts += ["", f"Background ({matrix.background_source}): {levels}"]
    parts += ["", f"Condition number {matrix.condition_number():.2f}; noise penalty "
              + ", ".join(f"{lab} {p:.2f}" for lab, p in zip(matrix.labels, matrix.noise_penalty()))]
    if flags:
        parts += [f"QC: {flag}" for flag in matrix.qc.get("flags", [])]
    return "\n".join(parts)


def spreading_table(matrix: BleedThroughMatrix) -> str:
    """The matrix's spillover spreading (its noise model through least-squares unmixing): each
    label's read-noise floor and the spread each label's signal adds to the others."""
    from ..measure.spreading import spreading_matrix

    spread, floor = spreading_matrix(matrix.matrix, matrix.noise_model)
    rows = [["spread from \\ into", *matrix.labels], ["(read-noise floor)", *(f"{f:.2f}" for f in floor)]]
    rows += [[label, *(f"{value:.3f}" for value in spread[j])] for j, label in enumerate(matrix.labels)]
    return ("Spillover spreading (standard deviation of a label = sqrt(floor^2 + sum of spread^2 x abundance of "
            "each label), abundance units)\n" + table(rows))
