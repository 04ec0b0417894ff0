"""The ensemble report: one self-contained HTML file of figures, tables, QC verdicts, provenance.

Figures are drawn with matplotlib's object API (no global pyplot state) and embedded as base64 PNG,
so the file can be mailed or archived alone. The report is written under a temporary name and
renamed when complete.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import io
import json
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .qc import QCResult, _nan_band, check_run
from .runread import REPORT_NAME, SUMMARY_NAME, Run, temporary_path

__all__ = ["CAUTIONS", "build_report"]

CAUTIONS = (
    "Realizations are possible models consistent with the data and the training image, not "
    "predictions: the truth is not among them, and their spread shows only the uncertainty the "
    "model was told about.",
    "P10, P50 and P90 here are the 10th, 50th and 90th percentiles of the ensemble (10 % of the "
    "realizations lie below P10). They depend on the training image, the parameters and the "
    "number of realizations.",
    "Decisions on water supply, contamination, drilling or storage safety rest with qualified "
    "professionals and must follow local regulations; this report is one input to their judgement.",
)

_INK = "#1f2a36"
_BAND = "#7aa6c2"
_TI = "#c0392b"
_BASE = "#8e8e8e"
_ACCENT = "#2e6f8e"

_CSS = """
:root{--ink:#1f2a36;--muted:#5b6b7a;--line:#d9e1e8;--accent:#2e6f8e;--bg:#fbfcfd}
*{box-sizing:border-box}
body{margin:0;font:15px/1.5 system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;color:var(--ink);
background:var(--bg)}
header{background:var(--ink);color:#fff;padding:28px 40px}
header h1{margin:0;font-weight:600;font-size:26px;letter-spacing:.2px}
header p{margin:4px 0 0;color:#c9d6e2}
nav{padding:10px 40px;border-bottom:1px solid var(--line);background:#fff;position:sticky;top:0}
nav a{color:var(--accent);margin-right:18px;text-decoration:none;font-size:14px}
main{max-width:1180px;margin:0 auto;padding:10px 40px 60px}
section{margin-top:34px}
h2{font-size:20px;font-weight:600;border-left:4px solid var(--accent);padding-left:10px}
h3{font-size:16px;font-weight:600;margin-bottom:4px}
p.note{color:var(--muted);font-size:13.5px;max-width:900px}
table{border-collapse:collapse;margin:10px 0;font-size:13.5px;background:#fff}
th,td{border:1px solid var(--line);padding:5px 10px;text-align:left;vertical-align:top}
th{background:#eef3f7;font-weight:600}
td.num{text-align:right;font-variant-numeric:tabular-nums}
.verdict{font-weight:700;text-transform:uppercase;font-size:12px;padding:2px 8px;border-radius:10px}
.pass{background:#dcefe2;color:#1d6b3a}.check{background:#fbefd0;color:#8a5a00}
.fail{background:#f7d9d6;color:#9b241b}
figure{margin:14px 0;background:#fff;border:1px solid var(--line);padding:10px}
figure img{max-width:100%;height:auto;display:block}
figcaption{color:var(--muted);font-size:13px;margin-top:6px}
.caution{background:#fff7e6;border:1px solid #f0d9a8;padding:12px 18px;border-radius:4px}
.caution li{margin:4px 0}
pre{background:#f3f6f9;border:1px solid var(--line);padding:10px;overflow:auto;font-size:12.5px}
"""


def _fig(
    width: float = 8.0, height: float = 3.2, ncols: int = 1, nrows: int = 1
) -> tuple[Any, Any]:
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100, layout="constrained")
    axes = fig.subplots(nrows, ncols, squeeze=False)
    for ax in axes.ravel():
        ax.tick_params(labelsize=8, colors=_INK)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
    return fig, axes


class _Doc:
    """Accumulates HTML sections and counts embedded figures."""

    def __init__(self) -> None:
        self.parts: list[str] = []
        self.figures: list[str] = []
        self.toc: list[tuple[str, str]] = []

    def section(self, ident: str, title: str) -> None:
        if self.toc:
            self.parts.append("</section>")
        self.toc.append((ident, title))
        self.parts.append(f'<section id="{ident}"><h2>{html.escape(title)}</h2>')

    def text(self, body: str, cls: str = "note") -> None:
        self.parts.append(f'<p class="{cls}">{html.escape(body)}</p>')

    def raw(self, body: str) -> None:
        self.parts.append(body)

    def figure(self, fig: Any, ident: str, caption: str) -> None:
        buf = io.BytesIO()
        fig.savefig(buf, format="png", dpi=100)
        data = base64.b64encode(buf.getvalue()).decode("ascii")
        self.figures.append(ident)
        self.parts.append(
            f'<figure data-figure="{ident}"><img alt="{html.escape(caption)}" '
            f'src="data:image/png;base64,{data}"><figcaption>{html.escape(caption)}'
            "</figcaption></figure>"
        )

    def table(self, header: Sequence[str], rows: Sequence[Sequence[Any]], ident: str = "") -> None:
        attr = f' data-table="{ident}"' if ident else ""
        out = [
            f"<table{attr}><tr>"
            + "".join(f"<th>{html.escape(str(h))}</th>" for h in header)
            + "</tr>"
        ]
        for row in rows:
            cells = []
            for c in row:
                if isinstance(c, _Html):
                    cells.append(f"<td>{c.body}</td>")
                elif isinstance(c, float | np.floating):
                    cells.append(f'<td class="num">{_num(float(c))}</td>')
                elif isinstance(c, int | np.integer):
                    cells.append(f'<td class="num">{int(c)}</td>')
                else:
                    cells.append(f"<td>{html.escape(str(c))}</td>")
            out.append("<tr>" + "".join(cells) + "</tr>")
        out.append("</table>")
        self.parts.append("".join(out))


class _Html:
    def __init__(self, body: str) -> None:
        self.body = body


def _num(x: float) -> str:
    if not np.isfinite(x):
        return "–"
    if x != 0 and (abs(x) >= 1e5 or abs(x) < 1e-3):
        return f"{x:.3e}"
    return f"{x:.4g}"


def _slice_maps(
    doc: _Doc,
    r: Run,
    var: str,
    picks: Sequence[int],
    cats: list[dict[str, Any]],
    caption: str,
    labels: Mapping[int, str] | None = None,
) -> None:
    from matplotlib.colors import BoundaryNorm, ListedColormap

    codes = [c["code"] for c in cats]
    cmap = ListedColormap([c["colour"] for c in cats])
    norm = BoundaryNorm(np.arange(len(codes) + 1) - 0.5, len(codes))
    nz, ny, _ = r.grid.shape
    three_d = nz > 1
    rows = 2 if three_d else 1
    fig, axes = _fig(2.6 * len(picks) + 1.2, 2.6 * rows + 0.3, ncols=len(picks), nrows=rows)
    im = None
    for j, i in enumerate(picks):
        real = r.realization(i, var)
        idx = np.searchsorted(codes, real)
        idx = np.where(np.isin(real, codes), idx, np.nan)
        ax = axes[0, j]
        im = ax.imshow(idx[nz // 2], origin="lower", cmap=cmap, norm=norm, interpolation="nearest")
        tag = f" ({labels[i]})" if labels and i in labels else ""
        ax.set_title(f"realization {i}{tag}: layer z={nz // 2}", fontsize=9)
        if three_d:
            axes[1, j].imshow(
                idx[:, ny // 2, :],
                origin="lower",
                cmap=cmap,
                norm=norm,
                interpolation="nearest",
                aspect="auto",
            )
            axes[1, j].set_title(f"section y={ny // 2}", fontsize=9)
    cb = fig.colorbar(im, ax=axes.ravel().tolist(), ticks=range(len(codes)), shrink=0.8)
    cb.ax.set_yticklabels([c["name"] for c in cats], fontsize=8)
    doc.figure(fig, f"realizations-{var}", caption)


def _map_row(
    doc: _Doc, maps: Sequence[tuple[str, np.ndarray, str]], ident: str, caption: str
) -> None:
    fig, axes = _fig(3.2 * len(maps), 3.0, ncols=len(maps))
    for ax, (title, arr, cmap) in zip(axes[0], maps, strict=True):
        if isinstance(cmap, str):
            im = ax.imshow(arr, origin="lower", cmap=cmap, interpolation="nearest")
            fig.colorbar(im, ax=ax, shrink=0.8)
        else:  # categories: colours of the categories, no colour bar
            ax.imshow(
                arr,
                origin="lower",
                cmap=cmap,
                vmin=-0.5,
                vmax=cmap.N - 0.5,
                interpolation="nearest",
            )
        ax.set_title(title, fontsize=9)
    doc.figure(fig, ident, caption)


def _band_plot(
    ax: Any, samples: np.ndarray, ref: np.ndarray | None, base: np.ndarray | None, label: str
) -> None:
    h = np.arange(1, samples.shape[-1] + 1)
    lo, hi = _nan_band(samples)
    mid = _nan_band(samples, (0.5, 0.5))[0]
    ax.fill_between(h, lo, hi, color=_BAND, alpha=0.45, lw=0, label="realizations P10–P90")
    ax.plot(h, mid, color=_ACCENT, lw=1.4, label="realizations P50")
    if base is not None:
        blo, bhi = _nan_band(base)
        ax.fill_between(
            h, blo, bhi, color=_BASE, alpha=0.25, lw=0, label="two-point baseline P10–P90"
        )
        ax.plot(h, _nan_band(base, (0.5, 0.5))[0], color=_BASE, lw=1.2, ls="--")
    if ref is not None:
        ax.plot(h, ref, color=_TI, lw=1.6, label="training image")
    ax.set_title(label, fontsize=9)
    ax.set_xlabel("lag (cells)", fontsize=8)


def build_report(
    run: Any,
    *,
    output: Any = None,
    ti: Any = None,
    qc: QCResult | None = None,
    title: str | None = None,
    baseline: bool = False,
    facies: int | None = None,
    wells: Mapping[str, Any] | None = None,
    connectivity: int = 6,
    memory_budget: int | None = None,
    qc_options: Mapping[str, Any] | None = None,
) -> Path:
    """Write the ensemble report, one self-contained HTML file.

    Parameters
    ----------
    run : Run or path
        The run folder. Its ``summary.zarr`` is computed first if missing.
    output : path, optional
        The HTML file (default ``RUN_DIR/report.html``).
    ti : array, optional
        The training image, for the checks against it.
    qc : QCResult, optional
        Results of :func:`~strataloom.qc.check_run`, if already computed.
    title : str, optional
        Heading (default: the study's name or the folder's name).
    baseline : bool
        Include the truncated-Gaussian two-point baseline.
    facies : int, optional
        Code of the facies whose bodies matter (see :func:`~strataloom.qc.check_run`).
    wells : mapping, optional
        Cells of wells (default: hard-data cells grouped into wells).
    connectivity : {6, 26}
        Neighbourhood of facies bodies.
    memory_budget : int, optional
        Passed to :func:`~strataloom.summary.summarize` when the summary is computed here.
    qc_options : mapping, optional
        Further keyword arguments of :func:`~strataloom.qc.check_run`.

    Returns
    -------
    pathlib.Path
        The report file.
    """
    from .summary import DEFAULT_BUDGET, open_summary, summarize

    r = run if isinstance(run, Run) else Run(run)
    out = Path(output) if output is not None else r.path / REPORT_NAME
    summary_path = r.path / SUMMARY_NAME
    if not summary_path.is_dir():
        summarize(
            r,
            wells=wells,
            connectivity=connectivity,
            memory_budget=DEFAULT_BUDGET if memory_budget is None else memory_budget,
        )
    sds = open_summary(summary_path)
    smeta = json.loads(sds.attrs["strataloom"])
    if qc is None and r.categorical:
        opts = dict(qc_options or {})
        qc = check_run(
            r,
            ti=ti,
            baseline=baseline,
            facies=facies,
            wells=wells,
            connectivity=connectivity,
            **opts,
        )
    study = r.meta.get("study") or {}
    heading = title or (study.get("name") if isinstance(study, dict) else None) or r.path.name

    doc = _Doc()
    now = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%d %H:%M UTC")

    # ---- verdicts and cautions
    doc.section("verdicts", "QC verdicts")
    if qc is not None and qc.verdicts:
        doc.table(
            ["check", "verdict", "value", "rule"],
            [
                [
                    d["check"],
                    _Html(f'<span class="verdict {d["verdict"]}">{d["verdict"]}</span>'),
                    d["value"],
                    d["rule"],
                ]
                for d in qc.verdicts
            ],
            ident="verdicts",
        )
        doc.text(
            "pass: no action needed; check: look at the figure below before using the ensemble; "
            "fail: the ensemble does not meet the rule. Thresholds are this project's choices."
        )
    else:
        doc.text("No categorical variable: no QC checks were run.")
    doc.raw(
        '<div class="caution"><strong>Cautions</strong><ul>'
        + "".join(f"<li>{html.escape(c)}</li>" for c in CAUTIONS)
        + "</ul></div>"
    )

    # ---- realizations
    doc.section("realizations", "Realizations")
    doc.text(
        f"{r.completed.size} of {r.size} realizations finished; grid {r.grid.shape} cells "
        f"(nz, ny, nx), spacing {r.grid.spacing}, origin {r.grid.origin}."
    )
    for var in r.categorical:
        tags: dict[int, str] = {}
        if qc is not None and qc.variable == var and qc.by_measure:
            for key, ri in qc.by_measure.items():
                tags[ri] = f"{tags[ri]}, {key}" if ri in tags else key
        picks = list(tags)
        for i in r.completed:
            if len(picks) >= min(3, r.completed.size):
                break
            if int(i) not in picks:
                picks.append(int(i))
        explain = f"; P10/P50/P90 of the {qc.measure_name}" if tags and qc is not None else ""
        _slice_maps(
            doc,
            r,
            var,
            picks[:4],
            r.categories(var),
            f"{var}: realizations {', '.join(map(str, picks[:4]))} (map view of the middle layer"
            + (", and a vertical section" if r.grid.shape[0] > 1 else "")
            + f"{explain})",
            labels=tags,
        )
    # ---- summaries
    doc.section("summaries", "Summaries")
    nz = r.grid.shape[0]
    for var in r.categorical:
        cats = r.categories(var)
        fac = qc.facies if qc is not None and qc.variable == var else cats[-1]["code"]
        k = [c["code"] for c in cats].index(fac)
        prob = sds[f"{var}_probability"].values[k, nz // 2]
        ent = sds[f"{var}_entropy"].values[nz // 2]
        from matplotlib.colors import ListedColormap

        codes = [c["code"] for c in cats]
        raw_ml = sds[f"{var}_most_likely"].values[nz // 2]
        ml = np.where(np.isin(raw_ml, codes), np.searchsorted(codes, raw_ml), np.nan)
        cat_map = ListedColormap([c["colour"] for c in cats])
        _map_row(
            doc,
            [
                (f"P({cats[k]['name']})", prob, "viridis"),
                ("most likely category", ml, cat_map),
                ("normalised entropy", ent, "magma"),
            ],
            f"summary-{var}",
            f"{var}: probability of {cats[k]['name']}, most likely category and normalised entropy "
            f"(0 = all realizations agree, 1 = categories equally likely), middle layer.",
        )
        table = smeta["tables"][var]
        prop = table["proportion"]
        rows = [
            [c["name"], prop["P10"][i], prop["P50"][i], prop["P90"][i], prop["mean"][i]]
            for i, c in enumerate(cats)
        ]
        doc.raw(f"<h3>{html.escape(var)}: share of each category per realization</h3>")
        doc.table(["category", "P10", "P50", "P90", "mean"], rows, ident=f"proportions-{var}")
        if "wells" in table:
            wl = table["wells"]
            vol = table["well_volume"]
            unit = "cell volumes" if smeta.get("cell_volume", 1.0) == 1.0 else "volume units"
            rows = [
                [w, cats[i]["name"], vol["P10"][j][i], vol["P50"][j][i], vol["P90"][j][i]]
                for j, w in enumerate(wl)
                for i in range(len(cats))
            ]
            doc.raw(
                f"<h3>{html.escape(var)}: volume of the bodies each well touches ({unit}, "
                f"{smeta['connectivity']}-connectivity)</h3>"
            )
            doc.table(["well", "category", "P10", "P50", "P90"], rows, ident=f"well-volume-{var}")
            mat = np.asarray(table["well_connection"])[:, :, k]
            fig, axes = _fig(0.45 * len(wl) + 3.2, 0.4 * len(wl) + 2.4)
            ax = axes[0, 0]
            im = ax.imshow(mat, vmin=0, vmax=1, cmap="Blues")
            ax.set_xticks(range(len(wl)), wl, fontsize=7, rotation=90)
            ax.set_yticks(range(len(wl)), wl, fontsize=7)
            fig.colorbar(im, ax=ax, shrink=0.8, label="probability")
            doc.figure(
                fig,
                f"well-connection-{var}",
                f"Probability that two wells are joined by one body of {cats[k]['name']} "
                f"({smeta['connectivity']}-connectivity); the diagonal is the probability that a "
                "well meets the facies at all.",
            )
    for var in r.continuous:
        mean = sds[f"{var}_mean"].values[nz // 2]
        var_ = sds[f"{var}_variance"].values[nz // 2]
        maps = [("mean", mean, "viridis"), ("variance", var_, "magma")]
        if f"{var}_p10" in sds:
            maps += [
                ("P10", sds[f"{var}_p10"].values[nz // 2], "viridis"),
                ("P90", sds[f"{var}_p90"].values[nz // 2], "viridis"),
            ]
        _map_row(
            doc,
            maps,
            f"summary-{var}",
            f"{var}: ensemble mean, variance and percentiles per cell, middle layer.",
        )

    # ---- QC figures
    if qc is not None:
        names = qc.names
        doc.section("qc-data", "QC against the data")
        if qc.hard is not None:
            doc.text(
                f"Hard data: {qc.hard['matched']} of {qc.hard['checked']} cell values reproduced "
                f"(share {qc.hard['share']:.4f})."
            )
        else:
            doc.text("No hard data in the run folder.")
        fig, axes = _fig(7.5, 3.0)
        ax = axes[0, 0]
        assert qc.proportions is not None
        ax.boxplot(
            qc.proportions, tick_labels=names, widths=0.5, medianprops={"color": _ACCENT, "lw": 1.6}
        )
        x = np.arange(1, len(names) + 1)
        if qc.target is not None:
            ax.scatter(x, qc.target, marker="D", color=_ACCENT, zorder=3, label="target")
        if qc.ti_proportions is not None:
            ax.scatter(
                x, qc.ti_proportions, marker="s", color=_TI, zorder=3, label="training image"
            )
        ax.set_ylabel("share of cells", fontsize=8)
        if qc.target is not None or qc.ti_proportions is not None:
            ax.legend(fontsize=8, frameon=False)
        doc.figure(
            fig,
            "proportions",
            "Share of each category per realization (boxes) against the "
            "target and the training image.",
        )
        if qc.soft is not None:
            fig, axes = _fig(4.2, 3.6)
            ax = axes[0, 0]
            for i, nm in enumerate(names):
                ax.plot(qc.soft["soft_mean"][i], qc.soft["simulated_mean"][i], "o-", ms=3, label=nm)
            ax.plot([0, 1], [0, 1], color=_BASE, lw=1, ls=":")
            ax.set_xlabel("soft probability (bin mean)", fontsize=8)
            ax.set_ylabel("mean simulated indicator", fontsize=8)
            ax.legend(fontsize=7, frameon=False)
            doc.figure(
                fig,
                "soft-agreement",
                "Soft-data agreement: in each bin of the soft probability, "
                "the share of realizations holding the category; on the dotted line when they "
                "agree.",
            )
        doc.section("qc-ti", "QC against the training image")
        used = [a for a in range(3) if r.grid.shape[a] > 1]
        if qc.variograms is not None:
            fig, axes = _fig(
                3.0 * len(used), 2.6 * len(names) + 0.4, ncols=len(used), nrows=len(names)
            )
            for k, nm in enumerate(names):
                for j, a in enumerate(used):
                    ref = qc.ti_variograms[k, a] if qc.ti_variograms is not None else None
                    base = (
                        qc.baseline_variograms[:, a]
                        if qc.baseline_variograms is not None and qc.codes[k] == qc.facies
                        else None
                    )
                    _band_plot(
                        axes[k, j], qc.variograms[:, k, a], ref, base, f"{nm}, along {'zyx'[a]}"
                    )
            row = qc.codes.index(qc.facies) if qc.baseline_variograms is not None else 0
            axes[row, 0].legend(fontsize=7, frameon=False)
            doc.figure(
                fig,
                "variograms",
                "Indicator variograms along the axes (FFT): realizations' band "
                "against the training image"
                + (" and the two-point baseline." if qc.baseline_variograms is not None else "."),
            )
        if qc.connectivity_fn is not None:
            fig, axes = _fig(3.0 * len(used), 2.8, ncols=len(used))
            fname = names[qc.codes.index(qc.facies)] if qc.facies is not None else ""
            for j, a in enumerate(used):
                ref = qc.ti_connectivity_fn[a] if qc.ti_connectivity_fn is not None else None
                base = (
                    qc.baseline_connectivity_fn[:, a]
                    if qc.baseline_connectivity_fn is not None
                    else None
                )
                _band_plot(
                    axes[0, j], qc.connectivity_fn[:, a], ref, base, f"{fname}, along {'zyx'[a]}"
                )
                axes[0, j].set_ylim(-0.02, 1.02)
            axes[0, 0].set_ylabel("P(connected | both in facies)", fontsize=8)
            axes[0, 0].legend(fontsize=7, frameon=False)
            doc.figure(
                fig,
                "connectivity",
                f"Connectivity functions of {fname} "
                f"({qc.connectivity}-connectivity): probability that two cells of the facies a lag "
                "apart lie in one body. A two-point model with the same proportions and variogram "
                "need not connect the same way."
                if qc.baseline_connectivity_fn is not None
                else f"Connectivity functions of {fname} ({qc.connectivity}-connectivity): "
                "probability "
                "that two cells of the facies a lag apart lie in one body.",
            )
            if qc.baseline_model is not None:
                m = qc.baseline_model
                doc.text(
                    f"Two-point baseline: truncated Gaussian fields with the same proportions, "
                    f"{m.model} correlation fitted to the indicator variogram of {fname}, "
                    "practical "
                    f"ranges (z, y, x) = {', '.join(_num(x) for x in m.ranges)} cells."
                )
        if qc.pattern_baseline is not None and qc.variograms is not None:
            js = _pattern_js(qc)
            fig, axes = _fig(5.5, 2.8)
            ax = axes[0, 0]
            ax.hist(js, bins=min(20, max(5, js.size // 2)), color=_BAND, edgecolor="white")
            ax.axvline(qc.pattern_baseline, color=_TI, lw=1.6, label="TI half versus half")
            ax.set_xlabel("Jensen–Shannon divergence to the TI (bits)", fontsize=8)
            ax.legend(fontsize=8, frameon=False)
            doc.figure(
                fig,
                "patterns",
                f"Histograms of {'×'.join(map(str, qc.pattern_size))} patterns: "
                "divergence of each realization from the training image, against the divergence "
                "between the two halves of the training image (the achievable baseline).",
            )
        if qc.copies:
            doc.section("copies", "Copy diagnostics")
            doc.table(
                [
                    "realization",
                    "share in verbatim patches",
                    "largest patch (cells)",
                    f"patches > {qc.copies[0]['min_size']} cells",
                    "copied cells",
                ],
                [
                    [d["realization"], d["share"], d["largest"], d["patches"], d["copied"]]
                    for d in qc.copies
                ],
                ident="copies",
            )
        if qc.orientation is not None:
            _orientation_section(doc, qc)
        doc.section("representatives", "Representative realizations")
        assert qc.measure is not None and qc.by_measure is not None
        fig, axes = _fig(6.0, 2.8)
        ax = axes[0, 0]
        ax.hist(
            qc.measure, bins=min(20, max(5, qc.measure.size // 2)), color=_BAND, edgecolor="white"
        )
        pos = {ri: j for j, ri in enumerate(qc.realizations)}
        for key, ri in qc.by_measure.items():
            ax.axvline(qc.measure[pos[ri]], color=_TI, lw=1.2)
            ax.text(qc.measure[pos[ri]], ax.get_ylim()[1] * 0.92, f" {key}", color=_TI, fontsize=8)
        ax.set_xlabel(qc.measure_name, fontsize=8)
        doc.figure(
            fig,
            "measure",
            f"Distribution of the {qc.measure_name} over the ensemble, with the "
            "realizations nearest its P10, P50 and P90.",
        )
        rows = [[key, ri, float(qc.measure[pos[ri]])] for key, ri in qc.by_measure.items()]
        doc.table(["percentile", "realization", qc.measure_name], rows, ident="representatives")
        doc.text(
            f"Ranked by the {qc.measure_name}: the realizations nearest the ensemble's P10, P50 "
            "and "
            "P90 of that measure. For a set covering the spread of whole models, k-medoids on the "
            "share of differing cells between realizations (a fixed random sample of cells) picks "
            f"{', '.join(map(str, qc.medoids or []))}, standing for "
            f"{', '.join(map(str, qc.medoid_members or []))} realizations each. Send these to an "
            "expensive flow simulation rather than arbitrary ones."
        )

    # ---- provenance
    doc.section("provenance", "Parameters, inputs and provenance")
    eng = r.meta.get("engine") or {}
    doc.table(
        ["item", "value"],
        [
            ["run folder", str(r.path)],
            ["report written", now],
            ["strataloom version (run)", str(r.meta.get("version"))],
            ["strataloom version (report)", _version()],
            ["engine", str(eng.get("name"))],
            ["realizations", f"{r.completed.size} finished of {r.size}"],
            ["seeds", _short(r.meta.get("seeds"))],
            ["summary quantiles", str(smeta.get("quantile_method"))],
            ["connectivity", f"{smeta.get('connectivity')}-connectivity"],
        ],
        ident="provenance",
    )
    doc.raw(
        "<h3>Engine parameters</h3><pre>"
        + html.escape(json.dumps(eng.get("parameters", {}), indent=2))
        + "</pre>"
    )
    inputs = r.meta.get("inputs") or {}
    if inputs:
        doc.raw("<h3>Inputs (SHA-256)</h3>")
        doc.table(["file", "sha256"], [[k, val] for k, val in inputs.items()], ident="inputs")
    doc.raw(
        "<details><summary>Study as validated</summary><pre>"
        + html.escape(json.dumps(study, indent=2))
        + "</pre></details>"
    )
    doc.parts.append("</section>")

    nav = "".join(f'<a href="#{i}">{html.escape(t)}</a>' for i, t in doc.toc)
    page = (
        '<!DOCTYPE html><html lang="en"><head><meta charset="utf-8">'
        f"<title>{html.escape(str(heading))} — ensemble report</title>"
        '<meta name="viewport" content="width=device-width,initial-scale=1">'
        f"<style>{_CSS}</style></head>"
        f"<body><header><h1>{html.escape(str(heading))}</h1><p>Ensemble report · "
        f"{r.completed.size} realizations · {now}</p></header><nav>{nav}</nav><main>"
        + "".join(doc.parts)
        + "</main></body></html>"
    )
    tmp = temporary_path(out)
    tmp.write_text(page, encoding="utf-8")
    os.replace(tmp, out)
    return out


def _orientation_section(doc: _Doc, qc: QCResult) -> None:
    """Requested against measured local orientation (structure tensor) and the gap per realization."""
    o = qc.orientation
    assert o is not None and qc.facies is not None
    fname = qc.names[qc.codes.index(qc.facies)]
    doc.section("orientation", "Local orientation")
    fig, axes = _fig(10.5, 3.4, ncols=3)
    for ax, data, label in ((axes[0, 0], o["requested"], "requested"),
                            (axes[0, 1], o["measured"], "measured (ensemble)")):
        im = ax.imshow(data, origin="lower", cmap="twilight", vmin=0, vmax=180, interpolation="nearest")
        ax.set_title(f"{label}, layer z={o['layer']}", fontsize=9)
    fig.colorbar(im, ax=axes[0, 1], label="azimuth (degrees from +y)", shrink=0.85)
    ax = axes[0, 2]
    ax.hist(o["gap"], bins=min(20, max(5, o["gap"].size // 2)), color=_BAND, edgecolor="white")
    ax.axvline(10.0, color=_TI, lw=1.2, ls="--", label="pass threshold")
    ax.set_xlabel("mean angle to the requested direction (degrees)", fontsize=8)
    ax.legend(fontsize=7, frameon=False)
    doc.figure(
        fig,
        "orientation",
        f"Local azimuth of {fname} (structure tensor of each layer, scipy.ndimage gradients) against "
        f"the requested rotation added to the training image's own mean azimuth "
        f"({o['ti_azimuth']:.1f} degrees); right: the coherence-weighted mean gap of each realization.",
    )


def _pattern_js(qc: QCResult) -> np.ndarray:
    return np.asarray(qc.pattern_js if qc.pattern_js is not None else [], dtype=np.float64)


def _short(x: Any, limit: int = 12) -> str:
    if isinstance(x, list) and len(x) > limit:
        return ", ".join(map(str, x[:limit])) + f", … ({len(x)} in all)"
    return ", ".join(map(str, x)) if isinstance(x, list) else str(x)


def _version() -> str:
    from . import __version__

    return __version__
