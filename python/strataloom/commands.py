"""The CLI's subcommands. Each is a thin wrapper over the Python API."""

from __future__ import annotations

import argparse
from pathlib import Path

from .cli import command


def _check_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("study", metavar="STUDY", help="the study file (.toml)")
    p.add_argument(
        "--processes",
        type=int,
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
        type=int,
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
        type=int,
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
