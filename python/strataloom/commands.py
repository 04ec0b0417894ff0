"""The CLI's subcommands. Each is a thin wrapper over the Python API."""

from __future__ import annotations

import argparse
from collections.abc import Callable
from pathlib import Path

from .cli import command


def _positive_mib(text: str) -> float:
    """``--memory-mb``: a positive, finite number of MiB (argparse reports the refusal in MiB)."""
    try:
        value = float(text)
    except ValueError:
        value = float("nan")
    if not (value > 0 and value < float("inf")):
        raise argparse.ArgumentTypeError(f"must be a positive number of MiB, such as 256; got {text!r}")
    return value


def _process_count(text: str) -> int:
    """``--processes``: a whole number >= 0 (0 = all cores)."""
    try:
        value = int(text)
    except ValueError:
        value = -1
    if not 0 <= value <= 1024:
        raise argparse.ArgumentTypeError(f"must be a whole number in [0, 1024] (0 = all cores); got {text!r}")
    return value


def _connectivity_option(p: argparse.ArgumentParser) -> None:
    """The ``--connectivity`` option shared by the subcommands that label facies bodies."""
    p.add_argument(
        "--connectivity",
        type=int,
        choices=(6, 26),
        default=6,
        help="neighbourhood of facies bodies: 6 = faces, 26 = faces, edges and corners "
        "(default 6)",
    )


def _memory_option(p: argparse.ArgumentParser, what: str) -> None:
    """The ``--memory-mb`` option of the subcommands that may summarise a run."""
    p.add_argument(
        "--memory-mb", type=_positive_mib, default=256.0, help=f"memory for {what}, MiB (default 256)"
    )


def _run_dir_argument(p: argparse.ArgumentParser) -> None:
    """The positional run folder of the run subcommands."""
    p.add_argument("dir", metavar="DIR", help="run folder holding realizations.zarr")


def _ti_arguments(parser: argparse.ArgumentParser) -> None:
    sub = parser.add_subparsers(dest="ti_action", metavar="ACTION", required=True)
    b = sub.add_parser("build", help="build a training image from a TOML spec",
                       description="Build a training image from a TOML spec and write "
                       "STEM_facies.npy (+ one .npy per property), STEM.vti, STEM_sections.png "
                       "and STEM.json into the output folder.")
    b.add_argument("spec", help="the TOML builder spec")
    b.add_argument("--out", required=True, help="output folder (created if missing)")
    b.add_argument("--seed", type=int, default=None, help="override the spec's seed")
    b.add_argument("--stem", default="ti", help="file name stem (default: ti)")
    b.add_argument("--no-png", action="store_true", help="skip the PNG of sections")
    s = sub.add_parser("stats", help="statistics of a training image (.npy or .vti)",
                       description="Proportions, largest-body share, body sizes (and optionally "
                       "the indicator variograms) of a categorical training image.")
    s.add_argument("ti", help="a .npy array of codes or a .vti with a 'facies' cell array")
    s.add_argument("--spacing", type=float, nargs=3, metavar=("DZ", "DY", "DX"), default=None,
                   help="cell sizes (default: from the .vti, else 1 1 1)")
    _connectivity_option(s)
    s.add_argument("--json", action="store_true", help="print JSON (with variograms) instead")
    r = sub.add_parser("rank", help="rank candidate training images against well sequences",
                       description="Compare the frequencies of vertical facies patterns of the "
                       "wells with those of each candidate TI; best first.")
    r.add_argument("tis", nargs="+", help="candidate TIs (.npy or .vti)")
    r.add_argument("--wells", required=True,
                   help="a .npy array (wells, cells) of codes (-1 = not logged), or a CSV with "
                   "columns well,facies listed bottom up (see --top-down)")
    r.add_argument("--length", type=int, default=4, help="pattern length in cells (default 4)")
    r.add_argument("--top-down", action="store_true",
                   help="the wells are listed from the top down (depth order); the TI's z "
                   "axis points up")


def _read_ti(path: str) -> tuple[object, tuple[float, float, float] | None]:
    import numpy as np

    from . import _validate as v
    from .training import read_vti

    if not (path.endswith((".vti", ".npy")) and Path(path).is_file()):
        raise v.fail("TI", "an existing .npy or .vti file (check the path)", path)
    if path.endswith(".vti"):
        arrays, spacing, _ = read_vti(path)
        if "facies" not in arrays:
            raise ValueError(f"{path} has no 'facies' cell array (it has {', '.join(arrays)})")
        return arrays["facies"], spacing  # type: ignore[return-value]
    try:
        return np.load(path, allow_pickle=False), None
    except (OSError, ValueError) as e:  # not an .npy file, or one holding objects
        raise v.fail("TI", "a readable .npy array of category codes (no pickles)", path) from e


def _read_wells(path: str) -> list:
    import csv

    import numpy as np

    if path.endswith(".npy"):
        return list(np.load(path, allow_pickle=False))
    wells: dict[str, list[int]] = {}
    with open(path, newline="", encoding="utf-8") as f:
        rows = csv.DictReader(f)
        if rows.fieldnames is None or not {"well", "facies"} <= set(rows.fieldnames):
            raise ValueError(f"{path}: the wells CSV needs the columns 'well' and 'facies'")
        for i, row in enumerate(rows, 2):
            try:
                wells.setdefault(row["well"], []).append(int(row["facies"]))
            except ValueError as e:
                raise ValueError(f"{path}, line {i}: facies must be an integer code, "
                                 f"got {row['facies']!r}") from e
    return [np.array(w) for w in wells.values()]


def _ti(args: argparse.Namespace) -> int:
    import json
    from pathlib import Path

    from .training import build_training_image, describe, rank_training_images

    if args.ti_action == "build":
        ti = build_training_image(args.spec, seed=args.seed)
        written = ti.save(args.out, stem=args.stem, png=not args.no_png)
        print(ti.report())
        for kind, p in written.items():
            print(f"wrote {kind}: {p}")
        return 0
    if args.ti_action == "stats":
        a, spacing = _read_ti(args.ti)
        spc = tuple(args.spacing) if args.spacing else (spacing or (1.0, 1.0, 1.0))
        st = describe(a, spacing=spc, connectivity=args.connectivity)
        print(json.dumps(st.as_dict(), indent=1) if args.json else st.table())
        return 0
    cands = {Path(p).stem: _read_ti(p)[0] for p in args.tis}
    if len(cands) != len(args.tis):
        cands = {p: _read_ti(p)[0] for p in args.tis}
    ranking = rank_training_images(_read_wells(args.wells), cands, length=args.length,
                                   top_down=args.top_down)
    print(ranking.table())
    return 0


_ti.arguments = _ti_arguments  # type: ignore[attr-defined]
command("ti", "training images: build from a spec, statistics, ranking against wells")(_ti)
def _arguments(add: Callable[[argparse.ArgumentParser], None]) -> Callable:
    """Attach an ``add_arguments(parser)`` function to a subcommand before it is registered."""

    def wrap(run: Callable) -> Callable:
        run.arguments = add  # type: ignore[attr-defined]
        return run

    return wrap


def _load_ti(path: str | None, run_dir: Path) -> object:
    """A training image from a .npy file, else the run folder's copy, else the study's .npy file."""
    import json

    import numpy as np

    from . import _validate as v
    from .runread import Run

    if path is None and (run_dir / "training_image.npy").is_file():
        path = str(run_dir / "training_image.npy")  # written by `strataloom run`
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
    _run_dir_argument(p)
    _memory_option(p, "the quantile stack of one slab of cells")
    _connectivity_option(p)
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
    _run_dir_argument(p)
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
    _connectivity_option(p)
    _memory_option(p, "the summary's quantile stack, if the summary is computed")


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
    _run_dir_argument(p)
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


# --- study workflow: check, run, demo ---


def _check_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("study", metavar="STUDY", help="the study file (.toml)")
    p.add_argument(
        "--processes",
        type=_process_count,
        default=None,
        metavar="N",
        help="processes the time estimate assumes (default: the study's, else all cores)",
    )
    p.add_argument(
        "--no-probe",
        action="store_true",
        help="skip the timed trial realization (no time estimate)",
    )


def check(args: argparse.Namespace) -> int:
    from .study import load_study
    from .workflow import check_study

    study = load_study(args.study)
    for line in check_study(study, probe=not args.no_probe, processes=args.processes):
        print(line)
    print("study OK")
    return 0


check.arguments = _check_arguments  # type: ignore[attr-defined]
command(
    "check", "Validate a study, summarise grid, training image and wells, estimate memory and time."
)(check)


def _run_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("study", metavar="STUDY", help="the study file (.toml)")
    p.add_argument(
        "--out",
        required=True,
        metavar="DIR",
        help="run folder (created; resumed if it holds an unfinished run of the same study)",
    )
    p.add_argument(
        "--processes",
        type=_process_count,
        default=None,
        metavar="N",
        help="local worker processes (default: the study's, else all cores)",
    )
    p.add_argument(
        "--scheduler",
        default=None,
        metavar="ADDRESS",
        help="run on the Dask cluster whose scheduler is at ADDRESS (tcp://host:8786)",
    )
    p.add_argument(
        "--overwrite",
        action="store_true",
        help="replace a store in DIR that holds a different study",
    )
    p.add_argument("--no-progress", action="store_true", help="no progress bars")


def run(args: argparse.Namespace) -> int:
    from .study import load_study
    from .workflow import run_study

    study = load_study(args.study)
    summary = run_study(
        study,
        args.out,
        processes=args.processes,
        scheduler=args.scheduler,
        progress=not args.no_progress,
        overwrite=args.overwrite,
    )
    _print_run(summary)
    return 0


run.arguments = _run_arguments  # type: ignore[attr-defined]
command("run", "Run a study's ensemble into a run folder (resumes an interrupted run).")(run)


def _print_run(summary) -> None:
    e = summary.ensemble
    print(
        f"{len(e.computed)} realizations computed on {e.where} in {e.seconds:.1f} s "
        f"({e.already_done} already done); store {summary.store}"
    )
    for line in summary.extras:
        print(line)


def _demo_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "dir",
        metavar="DIR",
        nargs="?",
        default="strataloom-demo",
        help="folder for the demo study and its run (default ./strataloom-demo)",
    )
    p.add_argument(
        "--size",
        choices=("default", "large"),
        default="default",
        help="'large' runs a grid of over a million cells",
    )
    p.add_argument(
        "--processes",
        type=_process_count,
        default=None,
        metavar="N",
        help="local worker processes (default: all cores)",
    )
    p.add_argument("--no-progress", action="store_true", help="no progress bars")


def demo(args: argparse.Namespace) -> int:
    from .demo import run_demo

    run_demo(
        Path(args.dir),
        size=args.size,
        processes=args.processes,
        progress=not args.no_progress,
        echo=print,
    )
    return 0


demo.arguments = _demo_arguments  # type: ignore[attr-defined]
command("demo", "Write the invented alluvial-aquifer demo study and run it end to end.")(demo)
