"""``unmix align``: bead images (or controls) -> the chromatic registration file."""

from __future__ import annotations

from ..errors import InputError
from .args import add_image_options, check_output, label_paths, name_list


def add_parsers(sub, common) -> None:
    """Add the subcommand to the parser."""
    align = sub.add_parser("align", parents=[common], help="measure per-channel shifts (chromatic registration)",
                           description="Measure the shift of every channel against a reference channel, laterally "
                                       "(optionally varying over the field) and axially, from images of multicolour "
                                       "sub-resolution beads, or from the single-label controls when no beads were "
                                       "imaged. Give the file to measure, apply and coloc with --registration.")
    source = align.add_mutually_exclusive_group(required=True)
    source.add_argument("--beads", metavar="PATH[,PATH...]", help="images of multicolour beads (several fields "
                                                                    "comma-separated)")
    source.add_argument("--control", action="append", metavar="LABEL=PATH[,PATH...]",
                        help="single-label controls, as for measure (when no beads were imaged)")
    align.add_argument("--reference", metavar="CHANNEL", help="the channel the others are registered onto "
                                                              "(default: the first)")
    align.add_argument("--affine", action="store_true",
                       help="fit a lateral shift that varies over the field (beads only; needs beads spread out)")
    align.add_argument("--matrix", metavar="MATRIX.json", help="refuse images whose channels are not the matrix's")
    align.add_argument("--min-beads", type=int, default=None, metavar="N",
                       help="beads needed in every channel (5)")
    align.add_argument("-o", "--output", required=True, metavar="REGISTRATION.json", help="the file to write")
    add_image_options(align)
    align.set_defaults(run=run_align)


def run_align(args) -> int:
    from ..io.images import read_images
    from ..measure.registration import MIN_BEADS, fit_from_beads, fit_from_controls

    read = {"axes": args.axes, "channel_names": name_list(args.channel_names)}
    if args.beads:
        paths = [p.strip() for p in args.beads.split(",")]
        if any(not p for p in paths):
            raise InputError(f"--beads {args.beads!r}: empty path in the list; separate paths with single commas")
        controls = None
    else:
        controls = label_paths(args.control, "--control")
        paths = [p for ps in controls.values() for p in ps]
    output = check_output(args.output, paths + ([args.matrix] if args.matrix else []))
    if args.min_beads is not None and args.min_beads < 1:
        raise InputError(f"--min-beads {args.min_beads}: give at least 1")
    if args.affine and controls is not None:
        raise InputError("--affine: needs --beads (controls tie channels only where labels leak)")
    images = {path: read_images(path, **read) for path in paths}
    if args.matrix:
        from ..matrix import load_matrix

        channels = list(load_matrix(args.matrix).channels)
        for path, series in images.items():
            if sorted(series[0].channel_names) != sorted(channels):
                raise InputError(f"{path}: has channels {list(series[0].channel_names)}, the matrix {args.matrix} "
                                 f"{channels}; image the registration in the matrix's channels (or fix "
                                 "--channel-names)")
    if controls is None:
        registration = fit_from_beads([im for series in images.values() for im in series], reference=args.reference,
                                      affine=args.affine, min_beads=args.min_beads or MIN_BEADS)
    else:
        registration = fit_from_controls({label: [im for p in ps for im in images[p]]
                                          for label, ps in controls.items()}, reference=args.reference)
    registration.save(output)
    if not args.quiet:
        from ..report.summary import table

        rows = [["channel", "dz (planes)", "dy (px)", "dx (px)", "residual (px)"]]
        for c, channel in enumerate(registration.channels):
            dz, dy, dx = registration.shifts[c]
            residual = registration.residual_px[c] if registration.residual_px is not None else float("nan")
            rows.append([channel + (" (reference)" if channel == registration.reference else ""), f"{dz:+.2f}",
                         f"{dy:+.2f}", f"{dx:+.2f}", f"{residual:.2f}"])
        print(f"Registration from {registration.source} ({len(paths)} file{'s' if len(paths) > 1 else ''})"
              + (", lateral shift varying over the field (affine)" if registration.affine is not None else ""))
        print(table(rows))
        print(f"\nwrote {output}")
    return 0
