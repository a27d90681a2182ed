"""The ``latentdesk`` command: argument parsing and exit codes only.

Each sub-command hands its arguments to a service; this module maps the
outcome to an exit code: 0 success, 2 bad input (one line on stderr, no
traceback), 1 internal error.
"""

from __future__ import annotations

import argparse
import sys

import analysis
from analysis.errors import InputError

EXIT_OK, EXIT_INTERNAL, EXIT_BAD_INPUT = 0, 1, 2


class _OneLineParser(argparse.ArgumentParser):
    """Argument errors as one line on stderr and exit code 2 (no usage block)."""

    def error(self, message: str):
        command = self.prog.removeprefix("latentdesk").strip()  # "fit", "users add", or "" at the top
        self.exit(EXIT_BAD_INPUT, f"latentdesk: error: {command + ': ' if command else ''}{message}\n")


def _comma_list(text: str) -> list[str]:
    return [part.strip() for part in text.split(",") if part.strip()]


def _add_intake_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--id-column", help="column holding the sample ids")
    parser.add_argument("--sheet", help="XLSX sheet name (default: the first sheet)")
    parser.add_argument(
        "--below-limit",
        choices=["half", "sqrt2", "missing"],
        default="half",
        help="replace '<LOD' values by LOD/2 (half), LOD/sqrt(2) or leave them missing",
    )
    parser.add_argument(
        "--bad-cells",
        choices=["error", "missing"],
        default="error",
        help="text in a numeric column: refuse the file (error) or treat the cell as missing",
    )


def _print_warnings(warnings: list[str]) -> None:
    for warning in warnings:
        print(f"latentdesk: warning: {warning}", file=sys.stderr)


def _cmd_fit(args: argparse.Namespace) -> int:
    from webapp.services.headless import fit_to_folder

    summary = fit_to_folder(
        args.file,
        args.out,
        id_column=args.id_column,
        group_columns=args.group_column or [],
        sheet=args.sheet,
        scaling=args.scaling,
        log10=_comma_list(args.log10 or ""),
        components=args.components,
        exclude=_comma_list(args.exclude or ""),
        confidence=args.confidence,
        below_limit=args.below_limit,
        bad_cells=args.bad_cells,
        drop_constant=args.drop_constant,
        method=args.method,
    )
    _print_warnings(summary["warnings"])
    robust = summary.get("robust")
    how = f" by ROBPCA (h={robust['h']})" if robust else ""
    print(
        f"fitted {summary['n_components']} component(s){how} on {summary['n_samples']} samples x "
        f"{summary['n_variables']} variables; wrote {args.out}"
    )
    return EXIT_OK


def _cmd_apply(args: argparse.Namespace) -> int:
    from webapp.services.headless import apply_to_folder

    result = apply_to_folder(
        args.model,
        args.file,
        args.out,
        id_column=args.id_column,
        sheet=args.sheet,
        below_limit=args.below_limit,
        bad_cells=args.bad_cells,
    )
    _print_warnings(result["warnings"])
    print(f"scored {result['n_samples']} new sample(s); wrote {args.out}")
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    parser = _OneLineParser(
        prog="latentdesk", description="Review multivariate data with PCA."
    )
    parser.add_argument("--version", action="version", version=f"latentdesk {analysis.__version__}")
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    fit = commands.add_parser("fit", help="fit a PCA model to a CSV/TSV/XLSX file")
    fit.add_argument("file", help="data file (rows are samples)")
    _add_intake_options(fit)
    fit.add_argument(
        "--group-column",
        action="append",
        help="treat this column as metadata (grouping), even when numeric; repeatable",
    )
    fit.add_argument(
        "--scaling", choices=["none", "center", "autoscale", "pareto"], default="autoscale"
    )
    fit.add_argument("--log10", help="comma-separated variables to log10-transform first")
    fit.add_argument("--components", default="auto", help="number of components, or 'auto'")
    fit.add_argument("--exclude", help="comma-separated sample ids to leave out of the fit")
    fit.add_argument("--confidence", type=float, default=0.95, help="limit confidence level")
    fit.add_argument(
        "--method", choices=["classical", "robust"], default="classical",
        help="classical PCA, or robust PCA (ROBPCA; limits are its score- and orthogonal-distance cut-offs)",
    )
    fit.add_argument(
        "--drop-constant",
        action="store_true",
        help="leave out variables that cannot be scaled (constant) with a warning instead of refusing",
    )
    fit.add_argument("--out", required=True, help="output folder")
    fit.set_defaults(handler=_cmd_fit)

    apply = commands.add_parser("apply", help="score new samples against a saved model")
    apply.add_argument("model", help="model.json written by 'latentdesk fit'")
    apply.add_argument("file", help="data file with the new samples")
    _add_intake_options(apply)
    apply.add_argument("--out", required=True, help="output folder")
    apply.set_defaults(handler=_cmd_apply)

    from webapp.cli.platform import add_platform_commands

    add_platform_commands(commands)  # serve, demo, users, tokens

    from webapp.cli.review import add_review_commands

    add_review_commands(commands)  # log verify

    from webapp.cli.batches import add_batch_commands

    add_batch_commands(commands)  # batches check (posts to a running server)

    from webapp.cli.backup import add_backup_commands

    add_backup_commands(commands)  # backup, restore

    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.handler(args)
    except InputError as exc:
        print(f"latentdesk: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        return EXIT_INTERNAL
    except Exception as exc:  # noqa: BLE001 - last line of defence: one line, exit 1
        print(f"latentdesk: internal error: {type(exc).__name__}: {exc}", file=sys.stderr)
        return EXIT_INTERNAL

