"""The manager's agreement report: one self-contained HTML file, PNG plots and a CSV.

Everything shown comes from an :class:`labeler.agreement.AgreementSummary`; this module
only lays it out. Plots are drawn with matplotlib's Agg canvas (no display, no global
pyplot state). Mask overlays are blended by :func:`labeler.masks.overlay.overlay_mask` in the
palette of the schema. Every file is written atomically (temporary file + rename).

Files written into ``out_dir``:

``agreement_report.html``
    The report; every plot is embedded as a base64 PNG data URI, so the file can be
    mailed or opened anywhere on its own.
``agreement_figures.csv``
    Every figure of the report, one per row, columns
    ``figure, pair, image, tile, day, class, other_class, metric, value, n``:

    * ``figure`` is one of ``pair`` (one annotator pair, all classes), ``pair_class``
      (one pair and one class), ``confusion`` (one cell: ``class`` = first annotator's
      class, ``other_class`` = second annotator's class, metric ``pixels``), ``class``
      (one class, all pairs pooled), ``overall`` (all pairs pooled), ``image``,
      ``tile`` and ``day``;
    * ``metric`` names the figure (``kappa``, ``iou``, ``dice``, ``pixel_accuracy``,
      ``mean_iou``, ``agreement``, ``images_compared``, ``pixels_compared``,
      ``comparisons``, ``pixels``);
    * ``value`` is empty where the figure is undefined (nothing compared);
    * ``n`` is the number of pixels behind the figure.
``plot_*.png``, ``least_*.png``
    The same plots and overlay strips as separate files.
"""

from __future__ import annotations

import base64
import csv
import html
import io
import math
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import matplotlib.dates as mdates
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from labeler.agreement import (
    AgreementSummary,
    ImageFigures,
    PairFigures,
    TileFigures,
    landis_koch_band,
)
from labeler.classes import ClassSchema
from labeler.fileio import atomic_write_bytes
from labeler.imagery.write import png_bytes
from labeler.masks.overlay import overlay_mask

__all__ = [
    "OverlaySource",
    "ReportFiles",
    "figure_rows",
    "format_agreement_table",
    "write_agreement_report",
]

HTML_NAME = "agreement_report.html"
CSV_NAME = "agreement_figures.csv"
CSV_COLUMNS = ("figure", "pair", "image", "tile", "day", "class", "other_class", "metric",
               "value", "n")

_CAUTION = (
    "Agreement figures describe how consistently the team labels the imagery; they do not "
    "certify that any mask is right. Where masks feed field operations such as spot "
    "spraying or fungicide timing, treat them as decision support only: local "
    "regulations and the advice of a licensed agronomist come first."
)


@dataclass(frozen=True)
class OverlaySource:
    """What the report needs to draw one image's overlays.

    Attributes
    ----------
    rgb : ndarray, shape (H, W, 3), uint8, or a raster read by window
        The field image (e.g. a :class:`labeler.imagery.tiling.LazyRaster` over an open
        image reader: only the panels' pixels are read).
    masks : mapping str -> ndarray (H, W), or rasters read by window
        Annotator name -> that annotator's stitched mask of the image.
    """

    rgb: np.ndarray
    masks: Mapping[str, np.ndarray]


@dataclass(frozen=True)
class ReportFiles:
    """Paths written by :func:`write_agreement_report`."""

    html: Path
    csv: Path
    plots: tuple[Path, ...]


def _check_schema(summary: AgreementSummary, schema: ClassSchema) -> None:
    if not isinstance(summary, AgreementSummary):
        raise TypeError(f"summary: expected an AgreementSummary, got {type(summary).__name__}")
    if tuple(schema.indices) != tuple(summary.class_indices):
        raise ValueError(
            f"schema: classes {schema.indices} differ from the summary's "
            f"{summary.class_indices}; pass the schema the summary was made with"
        )


# ---------------------------------------------------------------------------------------
# CSV rows
# ---------------------------------------------------------------------------------------
def _num(x: float | int) -> str:
    if isinstance(x, float | np.floating) and math.isnan(float(x)):
        return ""
    if isinstance(x, int | np.integer):
        return str(int(x))
    return repr(float(x))


def _pair_class_pixels(cm: np.ndarray, index: int) -> int:
    return int(cm[index].sum() + cm[:, index].sum() - cm[index, index])


def figure_rows(summary: AgreementSummary) -> list[dict[str, str]]:
    """Every figure of ``summary`` as CSV rows (see the module notes for the columns)."""
    rows: list[dict[str, str]] = []

    def add(figure: str, metric: str, value: float | int, n: int | None = None,
            **keys: str) -> None:
        row = dict.fromkeys(CSV_COLUMNS, "")
        row.update(figure=figure, metric=metric, value=_num(value))
        row["n"] = "" if n is None else str(int(n))
        for key, val in keys.items():
            row["class" if key == "cls" else key] = val
        rows.append(row)

    names = dict(zip(summary.class_indices, summary.class_names, strict=True))
    pairs: list[tuple[str, PairFigures]] = [(p.label, p) for p in summary.pairs]
    for label, p in [*pairs, ("all", summary.overall)]:
        fig = "overall" if p is summary.overall else "pair"
        n = p.pixels_compared
        for metric, value in (
            ("kappa", p.kappa), ("pixel_accuracy", p.pixel_accuracy),
            ("mean_iou", p.mean_iou), ("images_compared", p.images_compared),
            ("pixels_compared", p.pixels_compared),
        ):
            add(fig, metric, value, n, pair=label)
        if fig == "overall":
            continue
        for idx, name in names.items():
            npx = _pair_class_pixels(p.confusion, idx)
            add("pair_class", "iou", p.iou[idx], npx, pair=label, cls=name)
            add("pair_class", "dice", p.dice[idx], npx, pair=label, cls=name)
            add("pair_class", "kappa", p.class_kappa[idx], n, pair=label, cls=name)
        for i, name_i in names.items():
            for j, name_j in names.items():
                add("confusion", "pixels", int(p.confusion[i, j]), int(p.confusion[i, j]),
                    pair=label, cls=name_i, other_class=name_j)
    for c in summary.classes:
        add("class", "iou", c.iou, c.pixels, cls=c.name)
        add("class", "dice", c.dice, c.pixels, cls=c.name)
        add("class", "kappa", c.kappa, summary.overall.pixels_compared, cls=c.name)
    for img in summary.images:
        worst = "" if img.worst_pair is None else " / ".join(img.worst_pair)
        for metric, value in (("agreement", img.agreement), ("kappa", img.kappa),
                              ("mean_iou", img.mean_iou)):
            add("image", metric, value, img.pixels_compared, image=img.image, pair=worst)
        for t in img.tiles:
            for metric, value in (("agreement", t.agreement), ("kappa", t.kappa),
                                  ("mean_iou", t.mean_iou)):
                add("tile", metric, value, t.pixels_compared, image=t.image, tile=t.tile)
    for d in summary.days:
        day = d.day.isoformat()
        for metric, value in (("kappa", d.kappa), ("mean_iou", d.mean_iou),
                              ("pixel_accuracy", d.pixel_accuracy),
                              ("comparisons", d.comparisons)):
            add("day", metric, value, d.pixels_compared, day=day)
    return rows


def _csv_bytes(rows: Sequence[Mapping[str, str]]) -> bytes:
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=CSV_COLUMNS, lineterminator="\n")
    writer.writeheader()
    writer.writerows(rows)
    return buf.getvalue().encode("utf-8")


# ---------------------------------------------------------------------------------------
# plain-text table for the command line
# ---------------------------------------------------------------------------------------
def _fmt(x: float, digits: int = 3) -> str:
    return "-" if math.isnan(float(x)) else f"{float(x):.{digits}f}"


def format_agreement_table(summary: AgreementSummary, *, schema: ClassSchema) -> str:
    """The agreement table the ``agreement`` command prints.

    One block per annotator pair (and one for all pairs pooled): a row for all classes
    (Cohen's kappa and mean IoU over the classes) and a row per class (one-vs-rest
    kappa and IoU), with the Landis & Koch band of the kappa and the number of images
    compared. Undefined figures print as ``-``. Columns are aligned with spaces.
    """
    _check_schema(summary, schema)
    header = ("pair", "class", "kappa", "band", "IoU", "images")
    body: list[tuple[str, ...]] = []
    blocks = [(p.label, p) for p in summary.pairs] + [("all pairs", summary.overall)]
    for label, p in blocks:
        body.append((label, "all", _fmt(p.kappa), p.band, _fmt(p.mean_iou),
                     str(p.images_compared)))
        for c in schema:
            kappa = float(p.class_kappa[c.index])
            band = landis_koch_band(kappa)
            body.append(("", c.name, _fmt(kappa), band, _fmt(p.iou[c.index]),
                         str(p.images_compared)))
    if not summary.pairs:
        body.append(("(no annotator pair)", "", "-", "undefined", "-", "0"))
    widths = [max(len(r[i]) for r in [header, *body]) for i in range(len(header))]
    numeric = {2, 4, 5}

    def line(row: tuple[str, ...]) -> str:
        cells = [
            cell.rjust(widths[i]) if i in numeric else cell.ljust(widths[i])
            for i, cell in enumerate(row)
        ]
        return "  ".join(cells).rstrip()

    rule = "  ".join("-" * w for w in widths)
    return "\n".join([line(header), rule, *(line(r) for r in body)]) + "\n"


# ---------------------------------------------------------------------------------------
# plots
# ---------------------------------------------------------------------------------------
def _png_of(fig: Figure) -> bytes:
    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, bbox_inches="tight")
    return buf.getvalue()


def _plot_confusion(p: PairFigures, schema: ClassSchema) -> bytes:
    idx = list(schema.indices)
    cm = p.confusion[np.ix_(idx, idx)].astype(np.float64)
    rows = cm.sum(axis=1, keepdims=True)
    share = np.divide(cm, rows, out=np.zeros_like(cm), where=rows > 0)
    k = len(idx)
    size = 1.2 + 0.9 * k
    fig = Figure(figsize=(size + 1.2, size))
    ax = fig.add_subplot()
    im = ax.imshow(share, cmap="viridis", vmin=0.0, vmax=1.0)
    ax.set_xticks(range(k), labels=schema.names, rotation=30, ha="right")
    ax.set_yticks(range(k), labels=schema.names)
    ax.set_xlabel(f"{p.annotators[1]} (label)")
    ax.set_ylabel(f"{p.annotators[0]} (label)")
    ax.set_title(f"{p.label}: share of row, pixel count", fontsize=9)
    for i in range(k):
        for j in range(k):
            colour = "black" if share[i, j] > 0.6 else "white"
            ax.text(j, i, f"{share[i, j]:.2f}\n{int(cm[i, j])}", ha="center", va="center",
                    fontsize=7, color=colour)
    fig.colorbar(im, ax=ax, fraction=0.046, pad=0.04, label="share of row")
    return _png_of(fig)


def _plot_class_iou(summary: AgreementSummary, schema: ClassSchema) -> bytes:
    groups = [(p.label, p.iou) for p in summary.pairs] + [("all pairs", summary.overall.iou)]
    k = len(schema)
    width = 0.8 / max(len(groups), 1)
    fig = Figure(figsize=(max(4.0, 1.3 * k + 0.4 * len(groups)), 3.4))
    ax = fig.add_subplot()
    x = np.arange(k)
    for g, (label, iou) in enumerate(groups):
        values = np.array([iou[c.index] for c in schema], dtype=np.float64)
        heights = np.nan_to_num(values, nan=0.0)
        bars = ax.bar(x + (g - (len(groups) - 1) / 2) * width, heights, width, label=label)
        for bar, v in zip(bars, values, strict=True):
            if math.isnan(v):
                ax.text(bar.get_x() + bar.get_width() / 2, 0.02, "-", ha="center", fontsize=7)
    ax.set_xticks(x, labels=schema.names)
    ax.set_ylim(0, 1.05)
    ax.set_ylabel("IoU")
    ax.set_title("IoU per class ('-' = class not used by either side)", fontsize=9)
    ax.legend(fontsize=7, loc="lower right")
    return _png_of(fig)


def _plot_over_time(summary: AgreementSummary) -> bytes:
    fig = Figure(figsize=(6.0, 3.2))
    ax = fig.add_subplot()
    if summary.days:
        days = [d.day for d in summary.days]
        ax.plot(days, [d.kappa for d in summary.days], marker="o", label="Cohen's kappa")
        ax.plot(days, [d.mean_iou for d in summary.days], marker="s", label="mean IoU")
        ax.legend(fontsize=7)
        if len(days) <= 14:
            ax.set_xticks(days, labels=[d.isoformat() for d in days])
        else:
            locator = mdates.AutoDateLocator()
            ax.xaxis.set_major_locator(locator)
            ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
        fig.autofmt_xdate()
    else:
        ax.text(0.5, 0.5, "no comparison yet", ha="center", va="center",
                transform=ax.transAxes)
    lowest = min([0.0, *(d.kappa for d in summary.days if not math.isnan(d.kappa))])
    ax.set_ylim(lowest - 0.05 if lowest < 0 else 0.0, 1.05)
    ax.set_ylabel("agreement")
    ax.set_title("Agreement by day of the later save (all pairs pooled)", fontsize=9)
    return _png_of(fig)


#: Overlay panels smaller than this (longest side) are enlarged by whole pixels.
_MIN_PANEL_PX = 160


def _subsample(shape: tuple[int, int], max_px: int) -> int:
    return max(1, math.ceil(max(shape) / max_px))


#: Pixels read at once when a big image is subsampled for a panel.
_READ_PX = 1 << 22


def _sampled(raster, rows: tuple[int, int], cols: tuple[int, int], step: int) -> np.ndarray:
    """``raster[r0:r1:step, c0:c1:step]``, read in strips (an array or a lazy raster)."""
    (r0, r1), (c0, c1) = rows, cols
    chunk = max(step, (_READ_PX // max(1, c1 - c0)) // step * step)
    parts = [
        np.asarray(raster[a : min(r1, a + chunk), c0:c1])[::step, ::step]
        for a in range(r0, r1, chunk)
    ]
    return np.concatenate(parts) if parts else np.asarray(raster[r0:r0, c0:c1])


def _overlay_strip(
    entry: ImageFigures | TileFigures,
    source: OverlaySource,
    schema: ClassSchema,
    *,
    opacity: float,
    max_px: int,
) -> tuple[bytes, list[str]]:
    rgb = source.rgb
    shape = tuple(rgb.shape[:2])
    if isinstance(entry, TileFigures):
        r0, c0, hh, ww = entry.window
        rows, cols = (r0, r0 + hh), (c0, c0 + ww)
    else:
        rows, cols = (0, shape[0]), (0, shape[1])
    step = _subsample((rows[1] - rows[0], cols[1] - cols[0]), max_px)
    crop = _sampled(rgb, rows, cols, step)
    zoom = max(1, _MIN_PANEL_PX // max(crop.shape[:2]))
    panels = [crop]
    captions = ["image"]
    for name in sorted(source.masks):
        mask = source.masks[name]
        if tuple(mask.shape) != shape:
            raise ValueError(
                f"overlays[{entry.image!r}]: mask of {name} has shape {tuple(mask.shape)}, "
                f"expected {shape} like the image"
            )
        part = _sampled(mask, rows, cols, step)
        panels.append(overlay_mask(crop, part, schema=schema, opacity=opacity))
        captions.append(name)
    if zoom > 1:  # small tiles: enlarge by whole pixels so they stay readable
        panels = [np.repeat(np.repeat(p, zoom, axis=0), zoom, axis=1) for p in panels]
    gap = np.full((panels[0].shape[0], 6, 3), 255, np.uint8)
    strip = [panels[0]]
    for p in panels[1:]:
        strip += [gap, p]
    return png_bytes(np.ascontiguousarray(np.hstack(strip))), captions


# ---------------------------------------------------------------------------------------
# HTML
# ---------------------------------------------------------------------------------------
_STYLE = """
body { font-family: sans-serif; margin: 2em; max-width: 70em; color: #222; }
table { border-collapse: collapse; margin: 0.5em 0 1.5em; }
th, td { border: 1px solid #bbb; padding: 0.2em 0.6em; text-align: right; }
th { background: #eee; } td.name { text-align: left; }
.caution { border-left: 4px solid #D55E00; padding: 0.4em 0.8em; background: #fff6ee; }
figure { display: inline-block; margin: 0.5em 1em 1em 0; vertical-align: top; }
figcaption { font-size: 0.85em; color: #555; }
"""


def _img_tag(data: bytes, alt: str) -> str:
    uri = "data:image/png;base64," + base64.b64encode(data).decode("ascii")
    return f'<img src="{uri}" alt="{html.escape(alt)}">'


def _table(header: Sequence[str], rows: Sequence[Sequence[str]], name_cols: int = 1) -> str:
    out = ["<table>", "<tr>" + "".join(f"<th>{html.escape(h)}</th>" for h in header) + "</tr>"]
    for row in rows:
        cells = []
        for i, cell in enumerate(row):
            cls = ' class="name"' if i < name_cols else ""
            cells.append(f"<td{cls}>{html.escape(cell)}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</table>")
    return "\n".join(out)


#: Column titles of the project's agreement metric.
_METRIC_NAMES = {"kappa": "Cohen's kappa", "iou": "IoU"}


def write_agreement_report(
    summary: AgreementSummary,
    out_dir: str | os.PathLike[str],
    *,
    schema: ClassSchema,
    overlays: Mapping[str, OverlaySource] | None = None,
    title: str = "Annotator agreement",
    least: int = 10,
    opacity: float = 0.45,
    max_panel_px: int = 360,
    effort: Sequence[object] = (),
) -> ReportFiles:
    """Write the agreement report of ``summary`` into ``out_dir``.

    Parameters
    ----------
    summary : AgreementSummary
    out_dir : path
        Folder to write into (created when missing); existing report files are replaced
        atomically.
    schema : ClassSchema
        The schema the summary was made with (names on the axes, overlay colours).
    overlays : mapping str -> OverlaySource, optional
        Image id -> image and masks for the least agreed list. The caller needs to pass
        only the images of ``summary.least_agreed(least)``; entries without a source
        are listed without pictures.
    title : str
        Heading and HTML title.
    least : int
        Length of the least agreed list (tiles when the summary has tile windows, else
        images).
    opacity : float
        Overlay opacity (the editor's default, 0.45).
    max_panel_px : int
        Longest side of one overlay panel; larger crops are subsampled (nearest).
    effort : sequence
        Annotation effort per model version, oldest first: objects with ``model``,
        ``saves``, ``median_actions``, ``median_seconds`` and ``accepted_share``
        (:class:`labeler.workflow.VersionEffort`); shown in a section of their own.

    Returns
    -------
    ReportFiles
        Paths of the HTML file, the CSV and every PNG written.
    """
    _check_schema(summary, schema)
    if max_panel_px < 16:
        raise ValueError(f"max_panel_px: expected at least 16 pixels, got {max_panel_px}")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    overlays = {} if overlays is None else overlays
    plots: list[Path] = []

    def save_png(name: str, data: bytes) -> None:
        plots.append(atomic_write_bytes(out / name, data))

    parts: list[str] = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f"<title>{html.escape(title)}</title><style>{_STYLE}</style></head><body>",
        f"<h1>{html.escape(title)}</h1>",
        f'<p class="caution">{html.escape(_CAUTION)}</p>',
    ]
    ov = summary.overall
    parts.append(
        "<p>"
        + html.escape(
            f"{len(summary.pairs)} annotator pair(s), {ov.images_compared} pair-image "
            f"comparison(s), {ov.pixels_compared} pixels compared. Per-image metric: "
            f"{summary.metric}. Kappa bands after Landis & Koch (1977), upper bound "
            "inclusive: a convention for reading the numbers, not a verdict."
        )
        + "</p>"
    )

    # Pairs.
    parts.append("<h2>Annotator pairs</h2>")
    pair_rows = [
        [p.label, _fmt(p.kappa), p.band, _fmt(p.pixel_accuracy), _fmt(p.mean_iou),
         str(p.images_compared), str(p.pixels_compared)]
        for p in [*summary.pairs, ov]
    ]
    pair_rows[-1][0] = "all pairs"
    parts.append(_table(["pair", "Cohen's kappa", "band", "pixel accuracy", "mean IoU",
                         "images", "pixels"], pair_rows))
    parts.append("<h2>Classes (all pairs pooled)</h2>")
    parts.append(_table(
        ["class", "IoU", "Dice", "kappa (one vs rest)", "band", "pixels"],
        [[c.name, _fmt(c.iou), _fmt(c.dice), _fmt(c.kappa), c.band, str(c.pixels)]
         for c in summary.classes],
    ))
    parts.append("<pre>" + html.escape(format_agreement_table(summary, schema=schema)) + "</pre>")

    # Plots.
    parts.append("<h2>Confusion between annotators</h2>")
    for n, p in enumerate(summary.pairs, start=1):
        data = _plot_confusion(p, schema)
        save_png(f"plot_confusion_{n:02d}.png", data)
        parts.append(f"<figure>{_img_tag(data, 'confusion ' + p.label)}"
                     f"<figcaption>{html.escape(p.label)}</figcaption></figure>")
    if not summary.pairs:
        parts.append("<p>No annotator pair yet.</p>")
    data = _plot_class_iou(summary, schema)
    save_png("plot_class_iou.png", data)
    parts.append("<h2>IoU per class</h2><figure>" + _img_tag(data, "IoU per class")
                 + "</figure>")
    data = _plot_over_time(summary)
    save_png("plot_over_time.png", data)
    parts.append("<h2>Agreement over time</h2><figure>" + _img_tag(data, "agreement over time")
                 + "</figure>")
    if summary.days:
        parts.append(_table(
            ["day", "kappa", "mean IoU", "pixel accuracy", "comparisons", "pixels"],
            [[d.day.isoformat(), _fmt(d.kappa), _fmt(d.mean_iou), _fmt(d.pixel_accuracy),
              str(d.comparisons), str(d.pixels_compared)] for d in summary.days],
        ))

    # Effort per model version.
    parts.append("<h2>Annotation effort per model version</h2>")
    if effort:
        parts.append("<p>Full saves that started from the version's proposals: median "
                     "editing actions and active seconds per saved tile, and the share kept "
                     "unchanged.</p>")
        parts.append(_table(
            ["model", "saves", "median actions", "median seconds", "accepted unchanged"],
            [[str(e.model), str(e.saves), f"{e.median_actions:g}",
              f"{e.median_seconds:.1f}", f"{100 * e.accepted_share:.0f} %"] for e in effort],
        ))
    else:
        parts.append("<p>No save from a proposal yet.</p>")

    # Least agreed.
    entries = summary.least_agreed(least)
    kind = "tiles" if entries and isinstance(entries[0], TileFigures) else "images"
    parts.append(f"<h2>The {len(entries)} least agreed {kind}</h2>")
    if kind == "tiles":
        parts.append("<p>Tiles that two or more annotators labelled whole, compared over "
                     "the tile itself.</p>")
    # the project's metric first; kappa again only when the metric is another one
    header = ["image", "tile", _METRIC_NAMES.get(summary.metric, summary.metric)]
    if summary.metric != "kappa":
        header.append("Cohen's kappa")
    header += ["mean IoU", "pixels"]
    rows = []
    for e in entries:
        tile = e.tile if isinstance(e, TileFigures) else ""
        row = [e.image, tile, _fmt(e.agreement)]
        if summary.metric != "kappa":
            row.append(_fmt(e.kappa))
        rows.append([*row, _fmt(e.mean_iou), str(e.pixels_compared)])
    parts.append(_table(header, rows, name_cols=2))
    for n, e in enumerate(entries, start=1):
        source = overlays.get(e.image)
        if source is None:
            continue
        data, captions = _overlay_strip(e, source, schema, opacity=opacity,
                                        max_px=max_panel_px)
        save_png(f"least_{n:02d}.png", data)
        where = e.image + (f", tile {e.tile}" if isinstance(e, TileFigures) else "")
        caption = f"{where}: {summary.metric} {_fmt(e.agreement)}; panels: " + ", ".join(captions)
        parts.append(f"<figure>{_img_tag(data, where)}"
                     f"<figcaption>{html.escape(caption)}</figcaption></figure>")
    legend = ", ".join(f"{c.name} {c.colour}" for c in schema if c.colour is not None)
    parts.append(f"<p>Overlay colours (opacity {opacity:g}): {html.escape(legend)}; "
                 "unlabelled pixels and the background are not coloured.</p>")
    parts.append("</body></html>")

    csv_path = atomic_write_bytes(out / CSV_NAME, _csv_bytes(figure_rows(summary)))
    html_path = atomic_write_bytes(out / HTML_NAME, "\n".join(parts).encode("utf-8"))
    return ReportFiles(html=html_path, csv=csv_path, plots=tuple(plots))
