"""``unmix apply``: stacks + matrix -> unmixed abundances, batch by batch."""

from __future__ import annotations

import os
import sys
from pathlib import Path

from ..errors import InputError
from .args import (add_image_options, add_registration_option, add_settings_option, check_output_folder,
                   memory_size, name_list, numbers, one_line, registration_from)


def add_parsers(sub, common) -> None:
    """Add the subcommand to the parser."""
    apply = sub.add_parser("apply", parents=[common], help="unmix stacks with a matrix",
                           description="Unmix multichannel stacks by per-pixel non-negative least squares.")
    apply.add_argument("--matrix", required=True, metavar="MATRIX.json", help="measured or predicted matrix file")
    apply.add_argument("inputs", nargs="+", metavar="INPUT", help="TIFF, OME-TIFF or OME-Zarr inputs (globs allowed)")
    apply.add_argument("-o", "--output", required=True, metavar="OUTDIR", help="output folder")
    apply.add_argument("--method", default="nnls", help="nnls (default, exact non-negative) or ls (unconstrained)")
    apply.add_argument("--background", default="matrix", metavar="matrix|estimate|PATH",
                       help="background: the matrix file's (default), estimated per input, or a dark/unstained image")
    apply.add_argument("--scheduler", metavar="ADDRESS", help="run on this Dask distributed scheduler")
    apply.add_argument("--overwrite", action="store_true", help="replace outputs made from another matrix or input")
    apply.add_argument("--residual", action="store_true", help="also write the per-pixel misfit (RMS residual)")
    apply.add_argument("--saturation", metavar="V[,V...]", help="saturation level, one or one per channel")
    apply.add_argument("--memory", metavar="SIZE", default="1G",
                       help="most memory for pixels in flight, e.g. 512M or 4G (1G); fewer blocks are computed "
                            "together, and planes too large for it are cut into strips of rows")
    add_settings_option(apply)
    add_registration_option(apply)
    apply.add_argument("--weights", default="none", metavar="none|noise",
                       help="noise: weigh channels by the matrix's detector noise model (weighted least squares)")
    apply.add_argument("--uncertainty", action="store_true",
                       help="also write each abundance's standard error (<name>.standard-error.ome.tif)")
    add_image_options(apply)
    apply.set_defaults(run=run_apply)


def run_apply(args) -> int:
    import glob

    from ..engine.batch import ApplySettings, apply_matrix, is_set_member
    from ..matrix import load_matrix
    from ..report.summary import spreading_table, table

    if args.method not in ("nnls", "ls"):
        raise InputError(f"--method {args.method}: use nnls or ls")
    if args.weights not in ("none", "noise"):
        raise InputError(f"--weights {args.weights}: use none or noise")
    settings = ApplySettings(method=args.method, background=args.background, overwrite=args.overwrite,
                             residual=args.residual, saturation=numbers(args.saturation, "--saturation"),
                             weights=args.weights, uncertainty=args.uncertainty, axes=args.axes,
                             channel_names=name_list(args.channel_names),
                             memory=memory_size(args.memory), registration=registration_from(args))
    matrix = load_matrix(args.matrix)
    inputs = []
    for pattern in args.inputs:
        # A file that exists is taken as named, even if its name holds glob characters.
        literal = os.path.lexists(pattern) or not any(ch in pattern for ch in "*?[")
        # Outputs of an earlier run into the same folder are not inputs.
        matches = [pattern] if literal else [p for p in sorted(glob.glob(pattern))
                                             if not is_set_member(p, args.output)]
        if not matches:
            raise InputError(f"{pattern}: matches no file; check the pattern")
        inputs += matches
    for path in inputs:
        if not Path(path).exists():
            raise InputError(f"{path}: no such file; check the path")
    extra = [] if args.background in ("matrix", "estimate") else [args.background]
    outdir = check_output_folder(args.output, inputs + [args.matrix] + extra)
    from ..io.acquisition import check_settings

    check_settings(matrix.provenance.get("acquisition"), inputs, strict=args.strict_settings, reference_name=args.matrix,
                   channels=matrix.channels, channel_names=name_list(args.channel_names))
    matrix.check_unmixable(args.matrix)
    if not args.quiet:
        print(f"Matrix {args.matrix}: {len(matrix.labels)} labels in {len(matrix.channels)} channels; "
              f"condition number {matrix.condition_number():.2f}")
        print("Noise penalty (variance factor): "
              + ", ".join(f"{lab} {p:.2f}" for lab, p in zip(matrix.labels, matrix.noise_penalty())))
        if matrix.noise_model is not None:
            print(spreading_table(matrix))

    from tqdm import tqdm

    # A progress bar only for a person watching: never in logs or pipes.
    with tqdm(unit="block", desc="unmixing", disable=args.quiet or not sys.stderr.isatty(), leave=False) as bar:
        results = apply_matrix(matrix, inputs, outdir, settings=settings, scheduler=args.scheduler,
                               progress=bar.update)
    failed = [r for r in results if r.status == "failed"]
    if not args.quiet:
        rows = [["input", "status", "output", "NaN px", "saturated px"]]
        for r in results:
            rows.append([Path(r.input).name, r.status, Path(r.output).name if r.output else "-",
                         str(r.nan_pixels), str(r.saturated_pixels)])
        print(table(rows))
    for r in failed[:-1]:
        print(f"warning: {one_line(r.message)}", file=sys.stderr)
    if failed:
        raise InputError(f"{len(failed)} of {len(results)} inputs failed; last: {one_line(failed[-1].message)}")
    return 0

