"""The CLI's subcommands. Each is a thin wrapper over the Python API."""

from __future__ import annotations

import argparse
from collections.abc import Callable
from pathlib import Path

from .cli import command


def _arguments(add: Callable[[argparse.ArgumentParser], None]) -> Callable:
    """Attach an ``add_arguments(parser)`` function to a subcommand before it is registered."""

    def wrap(run: Callable) -> Callable:
        run.arguments = add  # type: ignore[attr-defined]
        return run

    return wrap


def _load_ti(path: str | None, run_dir: Path) -> object:
    """A training image from a .npy file, or the one named in the study (if it is a .npy file)."""
    import json

    import numpy as np

    from . import _validate as v
    from .runread import Run

    if path is None:
        study = Run(run_dir).meta.get("study") or {}
        ti = study.get("training_image") if isinstance(study, dict) else None
        name = ti.get("file") if isinstance(ti, dict) else ti if isinstance(ti, str) else None
        if not (isinstance(name, str) and name.endswith(".npy")):
            return None
        f = Path(name) if Path(name).is_absolute() else run_dir / name
        if not f.is_file():
            return None
        path = str(f)
    f = Path(path)
    if f.suffix != ".npy" or not f.is_file():
        raise v.fail(
            "--ti",
            "an existing .npy file holding the training image's category codes",
            json.dumps(path),
        )
    return np.load(f, allow_pickle=False)


def _summarize_args(p: argparse.ArgumentParser) -> None:
    p.add_argument("dir", metavar="DIR", help="run folder holding realizations.zarr")
    p.add_argument(
        "--memory-mb",
        type=float,
        default=256.0,
        help="memory for the quantile stack of one slab of cells, MiB (default 256)",
    )
    p.add_argument(
        "--connectivity",
        type=int,
        choices=(6, 26),
        default=6,
        help="neighbourhood of facies bodies: 6 = faces, 26 = faces, edges, corners",
    )
    p.add_argument(
        "--no-quantiles",
        action="store_true",
        help="skip P10/P50/P90 of continuous variables (one read per realization)",
    )


@command("summarize", "summarise a run's realizations into DIR/summary.zarr")
@_arguments(_summarize_args)
def _summarize(args: argparse.Namespace) -> int:
    from .summary import summarize

    out = summarize(
        args.dir,
        memory_budget=int(args.memory_mb * 2**20),
        connectivity=args.connectivity,
        quantiles=not args.no_quantiles,
    )
    print(f"wrote {out}")
    return 0


def _report_args(p: argparse.ArgumentParser) -> None:
    p.add_argument("dir", metavar="DIR", help="run folder holding realizations.zarr")
    p.add_argument(
        "--ti",
        metavar="FILE.npy",
        help="training image (category codes) for the checks "
        "against it; default: the study's, if it is a .npy file",
    )
    p.add_argument("--out", metavar="FILE", help="report file (default DIR/report.html)")
    p.add_argument(
        "--facies",
        type=int,
        help="code of the facies whose bodies matter (default: the least abundant)",
    )
    p.add_argument(
        "--baseline",
        action="store_true",
        help="add a truncated-Gaussian two-point baseline to the connectivity plots",
    )
    p.add_argument(
        "--connectivity",
        type=int,
        choices=(6, 26),
        default=6,
        help="neighbourhood of facies bodies",
    )
    p.add_argument(
        "--memory-mb",
        type=float,
        default=256.0,
        help="memory for the summary's quantile stack, MiB, if the summary is computed",
    )


@command("report", "write the ensemble report DIR/report.html (summarising first if needed)")
@_arguments(_report_args)
def _report(args: argparse.Namespace) -> int:
    from .report import build_report

    ti = _load_ti(args.ti, Path(args.dir))
    out = build_report(
        args.dir,
        output=args.out,
        ti=ti,
        baseline=args.baseline,
        facies=args.facies,
        connectivity=args.connectivity,
        memory_budget=int(args.memory_mb * 2**20),
    )
    print(f"wrote {out}")
    return 0


def _export_args(p: argparse.ArgumentParser) -> None:
    p.add_argument("dir", metavar="DIR", help="run folder holding realizations.zarr")
    p.add_argument(
        "--format",
        required=True,
        choices=("vti", "npy", "csv"),
        help="vti: VTK ImageData for ParaView; npy: NumPy arrays; csv: tables",
    )
    p.add_argument(
        "--realizations",
        default=None,
        help="'all' or indices such as 0,3,5 (vti/npy; default: the first finished)",
    )
    p.add_argument("--out", metavar="FOLDER", help="output folder (default DIR/export)")
    p.add_argument(
        "--no-summary", action="store_true", help="leave out the summary fields (vti/npy)"
    )


@command("export", "export realizations, summaries or tables of a run")
@_arguments(_export_args)
def _export(args: argparse.Namespace) -> int:
    from .export import export_run

    files = export_run(
        args.dir,
        args.format,
        out=args.out,
        realizations=args.realizations,
        summary=not args.no_summary,
    )
    for f in files:
        print(f)
    return 0
