"""The ``plexwash`` command line.

Exit codes: 0 success; 2 bad input or usage (one line ``error: <file>: <problem>`` on
stderr, no traceback); 3 a run finished but some ROIs failed; 1 anything else.
"""

from __future__ import annotations

import argparse
import errno
import json
import os
import sys
from pathlib import Path

from .errors import InputError, OutputError

EXIT_OK, EXIT_INTERNAL, EXIT_INPUT, EXIT_SOME_FAILED = 0, 1, 2, 3
#: Folder for the wash's staging files instead of the output's folder (e.g. local scratch).
STAGING_ENV = "PLEXWASH_STAGING_DIR"


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors as one ``error:`` line with exit status 2."""

    def error(self, message):
        self.exit(EXIT_INPUT, f"error: {self.prog}: {message}\n")


def build_parser() -> argparse.ArgumentParser:
    from ._version import __version__

    parser = _Parser(
        prog="plexwash",
        description="Clean multiplexed tissue ROIs: hot pixels, spillover, speckle, quality. "
        "Research use only; keep your raw data.",
    )
    parser.add_argument("--version", action="version", version=f"plexwash {__version__}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    p = commands.add_parser("inspect", help="per-channel quality of one ROI")
    p.add_argument("roi", type=Path, help="OME-TIFF, TIFF (with --stains) or OME-Zarr")
    p.add_argument("--recipe", type=Path, help="recipe TOML (its [quality] thresholds apply)")
    p.add_argument("--stains", type=Path, help="stains.csv (tag,marker,wash)")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.set_defaults(handler=_inspect)

    p = commands.add_parser("spill", help="estimate a spillover matrix")
    spill_commands = p.add_subparsers(dest="spill_command", metavar="SOURCE", parser_class=_Parser)
    q = spill_commands.add_parser("controls", help="from single-stain control acquisitions")
    q.add_argument("controls", type=Path, help="controls.csv (file,channel)")
    _spill_options(q)
    q.set_defaults(handler=_spill_controls)
    q = spill_commands.add_parser("tissue", help="from the tissue itself (no controls)")
    q.add_argument("rois", type=Path, nargs="+", help="ROIs to pool")
    _spill_options(q)
    q.set_defaults(handler=_spill_tissue)
    p.set_defaults(handler=lambda args: _missing_action(p))

    p = commands.add_parser("recipe", help="write recipes")
    recipe_commands = p.add_subparsers(dest="recipe_command", metavar="ACTION", parser_class=_Parser)
    q = recipe_commands.add_parser("new", help="write the commented default recipe")
    q.add_argument("-o", "--output", type=Path, required=True, help="recipe TOML to write")
    q.add_argument("--spillover", type=Path, help="spillover CSV the recipe should use")
    q.set_defaults(handler=_recipe_new)
    p.set_defaults(handler=lambda args: _missing_action(p))

    p = commands.add_parser("wash", help="wash one ROI")
    p.add_argument("roi", type=Path)
    p.add_argument("-o", "--output", required=True,
                   help="washed file (.ome.tiff or .ome.zarr) or a folder to write <roi>.ome.tiff into")
    _wash_options(p)
    p.set_defaults(handler=_wash)

    p = commands.add_parser("run", help="wash a whole cohort (resumable), with ledger, quality table, report")
    p.add_argument("cohort", type=Path, help="folder of ROIs")
    p.add_argument("-o", "--output", type=Path, required=True, help="run folder (rerun to resume)")
    _wash_options(p)
    p.add_argument("--samples", type=Path,
                   help="samples.csv (file,batch[,...]; default: samples.csv in the cohort folder)")
    p.add_argument("--workers", type=int, help="wash on N worker processes of this machine "
                   "(default: one per core for small ROIs, else this process)")
    p.add_argument("--scheduler", help="join a running dask.distributed scheduler (tcp://host:port)")
    p.add_argument("--connect-timeout", type=float, default=5.0, metavar="SECONDS",
                   help="how long to try reaching --scheduler before giving up (default 5)")
    p.add_argument("--verify", action="store_true",
                   help="on resume, re-hash every finished ROI's input and output (default: compare "
                        "size and modification time with the ledger)")
    p.add_argument("--quiet", action="store_true", help="no progress on the terminal (run.log still written)")
    p.set_defaults(handler=_run)

    p = commands.add_parser("report", help="(re)write the HTML report of a run folder")
    p.add_argument("run_dir", type=Path)
    p.add_argument("-o", "--output", help="report file (.html) or folder (default RUN_DIR/report.html)")
    p.set_defaults(handler=_report)

    p = commands.add_parser("demo", help="the main job on the demo cohort: spillover, run, report")
    p.add_argument("--out", type=Path, default=Path("plexwash-demo"), help="run folder (default ./plexwash-demo)")
    p.add_argument("--workers", type=int, help="wash on N worker processes of this machine "
                   "(default: one per core for small ROIs, else this process)")
    p.set_defaults(handler=_demo)

    p = commands.add_parser("studio", help="open the napari studio")
    p.add_argument("cohort", type=Path, nargs="?", help="cohort folder to list")
    p.set_defaults(handler=_studio)

    parser.set_defaults(handler=lambda args: _missing_action(parser))
    return parser


def _spill_options(p) -> None:
    p.add_argument("-o", "--output", type=Path, required=True, help="spillover CSV to write")
    p.add_argument("--all-pairs", action="store_true",
                   help="estimate every pair, not only the physically plausible ones (M+-1, isotopes, M+16)")
    p.add_argument("--heatmap", type=Path, help="also write the matrix as a heatmap PNG")
    p.add_argument("--stains", type=Path, help="stains.csv (tag,marker,wash)")


def _wash_options(p) -> None:
    p.add_argument("--recipe", type=Path, help="recipe TOML (defaults when omitted)")
    p.add_argument("--spillover", type=Path, help="spillover CSV (overrides the recipe's)")
    p.add_argument("--stains", type=Path, help="stains.csv (tag,marker,wash)")


def _missing_action(parser: argparse.ArgumentParser) -> int:
    parser.print_help(sys.stderr)
    return EXIT_INPUT


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``plexwash`` console script."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        code = args.handler(args)
    except InputError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_INPUT
    except OutputError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_INTERNAL
    except KeyboardInterrupt:
        print("error: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return EXIT_OK
    except Exception as exc:  # report, without a traceback unless asked for
        if os.environ.get("PLEXWASH_DEBUG"):
            raise
        if isinstance(exc, OSError) and exc.errno in (errno.ENOSPC, errno.EDQUOT):
            where = exc.filename or getattr(args, "output", None) or "output"
            print(f"error: {where}: no space left on device", file=sys.stderr)
            return EXIT_INTERNAL
        print(f"error: internal error: {exc.__class__.__name__}: {exc} "
              "(set PLEXWASH_DEBUG=1 for a traceback)", file=sys.stderr)
        return EXIT_INTERNAL
    return int(code or EXIT_OK)


# --------------------------------------------------------------------------- commands


def _load_recipe(args):
    from .recipe import load_recipe

    return load_recipe(getattr(args, "recipe", None))


def _inspect(args) -> int:
    from .io import read_roi

    recipe = _load_recipe(args)
    roi = read_roi(args.roi, stains=args.stains)
    report = inspection(roi, recipe)
    if args.json:
        print(json.dumps(report, indent=2))
    else:
        print(format_inspection(report))
    return EXIT_OK


def inspection(roi, recipe) -> dict:
    """Per-channel quality of one raw ROI as the ``inspect --json`` document (with the
    crosstalk audit, raw and washed, when the recipe declares exclusive pairs)."""
    from .audit import audit_one
    from .quality import measure_roi

    recipe.check_channels(roi.channels, roi=roi.path)
    matrix = None
    if recipe.spillover_path() is not None and recipe.compensation.enabled:
        from .spillover import read_spillover

        matrix = read_spillover(recipe.spillover_path())
    audit = audit_one(roi, recipe, spillover=matrix)  # an unknown pair is refused before measuring
    measured = measure_roi(roi, recipe, spillover=matrix, threads=os.cpu_count() or 1)
    rows = measured.raw_rows
    channels = []
    for row, label, use in zip(rows, roi.labels, roi.use, strict=True):
        entry = {"name": row["channel"], "marker": label, "wash": bool(use)}
        entry.update({k: v for k, v in row.items() if k not in ("roi", "channel", "stage")})
        channels.append(entry)
    return {
        "roi": roi.name,
        "path": str(roi.path),
        "shape": list(roi.shape),
        "dtype": str(roi.data.dtype),
        "pixel_size": list(roi.pixel_size) if roi.pixel_size else None,
        "flags": measured.flags["raw"],
        "channels": channels,
        **({"audit": audit} if audit else {}),
    }


def format_inspection(report: dict) -> str:
    """A readable table of one ROI's channel quality."""
    header = ("channel", "label", "SBR", "SNR", "fg %", "p50", "p99", "sat %", "flags")
    rows = []
    for ch in report["channels"]:
        rows.append((
            ch["name"],
            ch.get("label", ""),
            _num(ch.get("sbr")),
            _num(ch.get("snr")),
            _num(100 * ch["foreground_fraction"]) if ch.get("foreground_fraction") is not None else "",
            _num(ch.get("p50")),
            _num(ch.get("p99")),
            _num(100 * ch["saturated_fraction"]) if ch.get("saturated_fraction") is not None else "",
            ",".join(ch.get("flags", [])) or "ok",
        ))
    widths = [max(len(str(r[i])) for r in [header, *rows]) for i in range(len(header))]
    lines = [f"ROI {report['roi']}  ({report.get('path', '')})"]
    shape = report.get("shape")
    if shape:
        lines[0] += f"  {shape[0]} channels, {shape[1]} x {shape[2]} px"
    lines.append("  ".join(str(h).ljust(w) for h, w in zip(header, widths, strict=True)))
    lines.append("  ".join("-" * w for w in widths))
    for r in rows:
        lines.append("  ".join(str(v).ljust(w) for v, w in zip(r, widths, strict=True)))
    roi_flags = report.get("flags") or []
    lines.append(f"ROI flags: {', '.join(roi_flags) if roi_flags else 'none'}")
    if report.get("audit"):
        from .audit import format_audit

        lines.append(format_audit(report["audit"]))
    return "\n".join(lines)


def _num(value) -> str:
    if value is None:
        return ""
    value = float(value)
    if value != value:
        return "nan"
    if abs(value) >= 1000 or value == float("inf"):
        return f"{value:.3g}"
    return f"{value:.3g}" if abs(value) < 10 else f"{value:.1f}"


def _recipe_new(args) -> int:
    from .files import check_output, reached_inputs
    from .recipe import default_recipe, write_recipe

    out = check_output(args.output, reached_inputs([args.spillover]), kind="toml")
    recipe = default_recipe()
    if args.spillover is not None:
        from .spillover import read_spillover

        read_spillover(args.spillover)  # refuse a bad matrix now, not at run time
        spill = os.path.relpath(args.spillover.resolve(), out.resolve().parent)
        recipe = recipe.replace("compensation", spillover=spill)
    write_recipe(out, recipe)
    print(f"wrote {out}")
    return EXIT_OK


def _spill_controls(args) -> int:
    from .spillover import estimate_from_controls

    out = _spill_output(args, [args.controls, args.stains])
    matrix = estimate_from_controls(args.controls, all_pairs=args.all_pairs, stains=args.stains)
    return _write_matrix(args, out, matrix)


def _spill_tissue(args) -> int:
    from .files import check_output, reached_inputs
    from .io import read_roi
    from .spillover.tissue import estimate_tissue_pairs
    from .spillover.tissue_pairs import not_identifiable_path, write_not_identifiable

    out = _spill_output(args, [*args.rois, args.stains])
    unknown = check_output(not_identifiable_path(out), reached_inputs([*args.rois, args.stains]), kind="csv")
    rois = [read_roi(path, stains=args.stains) for path in args.rois]
    estimate = estimate_tissue_pairs(rois, all_pairs=args.all_pairs)
    code = _write_matrix(args, out, estimate.matrix)
    write_not_identifiable(unknown, estimate)
    print(f"{len(estimate.not_identifiable)} pairs not identifiable from the tissue (0 in the matrix), "
          f"listed in {unknown.name}; false-pair rate {estimate.false_pair_rate:.0%} (Benjamini-Hochberg)")
    return code


def _spill_output(args, inputs) -> Path:
    """Check every file a spillover estimate writes: the CSV, its interval files, the heatmap."""
    from .files import check_output, interval_paths, reached_inputs

    inputs = reached_inputs(inputs)
    out = check_output(args.output, inputs, kind="csv")
    for extra in interval_paths(out):
        check_output(extra, inputs, kind="csv")
    if args.heatmap is not None:
        check_output(args.heatmap, inputs, kind="png")
    return out


def _write_matrix(args, out: Path, matrix) -> int:
    from .spillover import interval_paths, write_spillover

    write_spillover(out, matrix, heatmap=args.heatmap)
    low, high = interval_paths(out)
    off = [(a, b, matrix.values[i, j]) for i, a in enumerate(matrix.channels)
           for j, b in enumerate(matrix.channels) if i != j and matrix.values[i, j] > 0]
    print(f"wrote {out} ({len(matrix.channels)} channels, {len(off)} non-zero spillover entries); "
          f"intervals in {low.name}, {high.name}" + (f"; heatmap {args.heatmap}" if args.heatmap else ""))
    for a, b, v in sorted(off, key=lambda t: -t[2])[:10]:
        print(f"  {a} -> {b}: {100 * v:.2f} %")
    return EXIT_OK


def _wash(args) -> int:
    import dataclasses

    from .files import check_output, reached_inputs
    from .io import ZARR_SUFFIXES, output_name, read_roi
    from .wash import wash_to_file

    recipe = _load_recipe(args)
    out = Path(args.output)
    name = out.name.lower()
    if name.endswith(ZARR_SUFFIXES):
        recipe = dataclasses.replace(recipe, output=dataclasses.replace(recipe.output, format="ome-zarr"))
    elif name.endswith((".tif", ".tiff")):
        recipe = dataclasses.replace(recipe, output=dataclasses.replace(recipe.output, format="ome-tiff"))
    elif out.is_dir() or args.output.endswith(("/", os.sep)):
        out = out / output_name(_roi_stem(args.roi), recipe.output)
    else:
        from .errors import InputError

        raise InputError(out, "output must end in .ome.tiff or .ome.zarr, or be a folder")
    check_output(out, reached_inputs([args.roi, args.recipe, recipe.spillover_path(), args.spillover,
                                      args.stains, *recipe.batch_spillover_paths().values()]),
                 kind="stack")
    from .run import bound_heap

    bound_heap()  # as a run does: threads share one malloc arena
    roi = read_roi(args.roi, stains=args.stains)
    recipe.check_size(roi)
    result = wash_to_file(roi, out, recipe, spillover=args.spillover,
                          staging_dir=os.environ.get(STAGING_ENV) or None)
    print(f"washed {roi.name} -> {out} in {result.seconds:.1f} s")
    if recipe.batch_spillover:  # batches come from a cohort's sample sheet; one ROI has none
        print("  note: [compensation.batches] applies to `plexwash run` with a sample sheet; "
              "this wash used [compensation] spillover (or --spillover)")
    for note in result.notes:
        print(f"  note: {note}")
    for step, rows in result.stats.items():
        fractions = [r["removed_fraction"] for r in rows if r.get("ran", True)]
        if fractions:
            worst = max(rows, key=lambda r: r.get("removed_fraction", 0.0))
            print(f"  {step}: removed {100 * sum(fractions) / len(fractions):.2f} % of signal on average, "
                  f"most from {worst['channel']} ({100 * worst['removed_fraction']:.2f} %)")
    return EXIT_OK


def _roi_stem(path: Path) -> str:
    from .io import roi_stem

    return roi_stem(path)


def _run(args) -> int:
    from .ledger import LEDGER

    # a first run: the workers' fork server imports while this process does (a rerun has no
    # early start: most of its ROIs may be done, and the run starts the server if it needs it)
    if args.scheduler is None and not (Path(args.output) / LEDGER).exists():
        from .run.pool import start_for_cohort

        start_for_cohort(args.cohort, args.workers)
    from .run import run_cohort

    summary = run_cohort(args.cohort, args.output, recipe=args.recipe, spillover=args.spillover,
                         stains=args.stains, samples=args.samples, workers=args.workers,
                         scheduler=args.scheduler,
                         connect_timeout=args.connect_timeout, progress=not args.quiet,
                         staging_dir=os.environ.get(STAGING_ENV) or None, verify=args.verify)
    _print_summary(summary)
    return summary.exit_code


def _print_summary(summary) -> None:
    print(f"{summary.done} done, {summary.skipped} skipped (already done), {summary.failed} failed "
          f"in {summary.seconds:.1f} s")
    if summary.failed_rois:
        print(f"failed: {', '.join(summary.failed_rois)} (errors in {summary.out_dir / 'ledger.jsonl'})")
    print(f"washed stacks, ledger.jsonl and quality.csv in {summary.out_dir}")
    if summary.report is not None:
        print(f"report: {summary.report}")
    if summary.error:
        print(f"error: {summary.error}", file=sys.stderr)


def _report(args) -> int:
    from .files import check_output, reached_inputs
    from .report import write_report
    from .run import LEDGER, REPORT

    output = Path(args.output) if args.output is not None else args.run_dir / REPORT
    if args.output is not None and (output.is_dir() or args.output.endswith(("/", os.sep))):
        output = output / REPORT
    inputs = [p for p in reached_inputs([args.run_dir]) if p != args.run_dir]
    check_output(output, [args.run_dir / LEDGER, *inputs], kind="html")
    path = write_report(args.run_dir, output=output)
    print(f"wrote {path}")
    return EXIT_OK


def _demo(args) -> int:
    from .run import run_demo

    summary = run_demo(args.out, workers=args.workers, staging_dir=os.environ.get(STAGING_ENV) or None)
    _print_summary(summary)
    return summary.exit_code


def _studio(args) -> int:
    try:
        from plexwash.plugin import launch_studio
    except ImportError as exc:
        from .errors import InputError

        raise InputError("plexwash studio", f"napari is not installed ({exc.name}); "
                         "install the studio extra: pip install 'plexwash[studio]'") from None
    launch_studio(args.cohort)
    return EXIT_OK


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
