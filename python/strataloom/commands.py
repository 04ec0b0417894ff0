"""The CLI's subcommands. Each is a thin wrapper over the Python API."""

from __future__ import annotations

import argparse

from .cli import command


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
    s.add_argument("--connectivity", type=int, choices=(6, 26), default=6,
                   help="6 (faces) or 26 (faces, edges and corners); default 6")
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

    from .training import read_vti

    if path.endswith(".vti"):
        arrays, spacing, _ = read_vti(path)
        if "facies" not in arrays:
            raise ValueError(f"{path} has no 'facies' cell array (it has {', '.join(arrays)})")
        return arrays["facies"], spacing  # type: ignore[return-value]
    return np.load(path, allow_pickle=False), None


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
