"""The ``labeler`` command: parses arguments, calls :mod:`labeler.workflow`, prints.

Exit codes: 0 success; 1 a user error (one clear line on stderr); 2 a usage error.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path

from labeler import __version__
from labeler.errors import LabelerError
from labeler.settings import STRATEGIES

__all__ = ["main", "build_parser"]

EPILOG = (
    "Masks are decision support only: before any spraying or fungicide decision, local "
    "regulations and licensed agronomic advice come first."
)


class _Bar:
    """A progress callback drawing a tqdm bar on stderr (quiet when not a terminal)."""

    def __init__(self, desc: str) -> None:
        from tqdm import tqdm

        self._tqdm = tqdm
        self.desc = desc
        self.bar = None

    def __call__(self, done: int, total: int, label: str = "") -> None:
        if self.bar is None:
            self.bar = self._tqdm(
                total=total,
                desc=self.desc,
                unit="",
                file=sys.stderr,
                leave=False,
                disable=None,
                dynamic_ncols=True,
            )
        if self.bar.total != total:
            self.bar.total = total
        self.bar.n = done
        if label:
            self.bar.set_postfix_str(label[-40:], refresh=False)
        self.bar.refresh()

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()

    def __enter__(self) -> _Bar:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def _table(headers: Sequence[str], rows: Sequence[Sequence[object]]) -> str:
    cells = [[str(h) for h in headers]] + [[("" if v is None else str(v)) for v in r] for r in rows]
    widths = [max(len(row[i]) for row in cells) for i in range(len(headers))]
    lines = []
    for k, row in enumerate(cells):
        lines.append(
            "  ".join(
                v.rjust(w) if k and v.replace(".", "").replace("-", "").isdigit() else v.ljust(w)
                for v, w in zip(row, widths, strict=True)
            ).rstrip()
        )
        if k == 0:
            lines.append("  ".join("-" * w for w in widths))
    return "\n".join(lines)


# -- commands ---------------------------------------------------------------------------
def cmd_init(args) -> int:
    from labeler.project import init_project

    with init_project(args.dir) as project:
        print(f"created project {project.root} (settings in {project.root / 'labeler.toml'})")
    return 0


def cmd_add(args) -> int:
    from labeler.project import open_project
    from labeler.workflow import add_images

    with open_project(args.dir) as project, _Bar("adding") as bar:
        results = add_images(project, args.images, copy=not args.in_place, progress=bar)
    for r in results:
        if r.status == "added":
            print(f"added {r.name}: {r.tiles} tiles")
        else:
            print(r.message)
    return 0


def format_status(st) -> str:
    from labeler.states import STATES

    out = [f"project {st.folder}: {st.images} images, {st.tiles} tiles"]
    if st.latest_model:
        miou = "" if st.latest_miou is None else f", validation mIoU {st.latest_miou:.3f}"
        out.append(f"model versions: {st.model_versions} (newest {st.latest_model}{miou})")
    out.append("")
    out.append("tiles per state")
    out.append(_table(["state", "tiles"], [(s, st.by_state.get(s, 0)) for s in STATES]))
    if st.by_image:
        out.append("")
        out.append("tiles per image")
        shown = [s for s in STATES if any(c.get(s, 0) for _, _, c, _ in st.by_image)]
        out.append(
            _table(
                ["image", "tiles", "georef", *shown],
                [
                    (n, k, "yes" if g else "no", *(c.get(s, 0) for s in shown))
                    for n, k, c, g in st.by_image
                ],
            )
        )
    out.append("")
    out.append("per annotator")
    if st.by_annotator:
        out.append(
            _table(
                ["annotator", "tiles saved", "scribble saves", "actions", "minutes"],
                [
                    (
                        a,
                        int(d["tiles"]),
                        int(d["scribbles"]),
                        int(d["actions"]),
                        f"{d['seconds'] / 60:.1f}",
                    )
                    for a, d in sorted(st.by_annotator.items())
                ],
            )
        )
    else:
        out.append("(no annotations yet)")
    return "\n".join(out)


def cmd_status(args) -> int:
    from labeler.project import open_project
    from labeler.workflow import project_status

    with open_project(args.dir) as project:
        print(format_status(project_status(project)))
    return 0


def cmd_demo(args) -> int:
    from labeler.demo.build import build_demo_project, run_demo_round
    from labeler.workflow import project_status

    fields = None if args.fields is None else Path(args.fields)
    with _Bar("demo") as bar:
        project, lines = build_demo_project(
            Path(args.out), fields=fields, fresh=args.fresh, progress=bar
        )
    with project:
        for line in lines:
            print(line)
        if not args.setup_only:
            print("one round of the loop, with two simulated annotators:")
            with _Bar("demo round") as bar:
                run_demo_round(
                    project, fields=fields, progress=bar, say=lambda text: print("  " + text)
                )
        print()
        print(format_status(project_status(project)))
        print()
        print(
            f"next: labeler queue {args.out} --annotator YOUR-NAME   (or labeler edit {args.out} --next ...)"
        )
    return 0


def cmd_pick(args) -> int:
    from labeler.project import open_project
    from labeler.workflow import rank_tiles

    with open_project(args.dir) as project, _Bar("ranking") as bar:
        result = rank_tiles(project, strategy=args.strategy, k=args.k, seed=args.seed, progress=bar)
    if result.note:
        print(f"note: {result.note}")
    print(
        f"ranked {len(result.items)} tiles with strategy {result.strategy}; the next batch of {result.k}:"
    )
    rows = [
        (t.rank + 1, t.tile_id, t.image, f"{t.row},{t.col}", f"{t.score:.4f}", t.reason)
        for t in result.batch
    ]
    print(_table(["rank", "tile", "image", "row,col", "score", "why"], rows))
    if result.unranked:
        print(
            f"{result.unranked} tiles have no proposal yet and are not ranked (run 'labeler propose')"
        )
    return 0


def _parse_since(text: str | None):
    if text is None:
        return None
    from datetime import UTC, date, datetime

    try:
        if len(text) == 10:
            return date.fromisoformat(text)
        value = datetime.fromisoformat(text)
        return value if value.tzinfo else value.replace(tzinfo=UTC)
    except ValueError:
        raise LabelerError(
            f"--since: expected a date like 2027-05-14 (or an ISO date-time), got {text!r}"
        ) from None


def cmd_agreement(args) -> int:
    from labeler.export.report import format_agreement_table
    from labeler.project import open_project
    from labeler.workflow import write_agreement

    since = _parse_since(args.since)
    with open_project(args.dir) as project, _Bar("agreement") as bar:
        out = Path(args.out) if args.out else project.root / "reports" / "agreement"
        summary, files = write_agreement(project, out, since=since, progress=bar)
        print(format_agreement_table(summary, schema=project.settings.classes))
    print()
    print(f"report: {files.html}")
    print(f"figures: {files.csv}")
    return 0


def cmd_edit(args) -> int:
    from labeler.project import open_project
    from labeler.workflow import edit_tile

    if args.tile is None and not args.next:
        raise LabelerError("edit: name a TILE id or pass --next for the next tile of your queue")
    if args.tile is not None and args.next:
        raise LabelerError("edit: give either a TILE id or --next, not both")
    with open_project(args.dir) as project:
        tile_id, outcome = edit_tile(project, args.tile, args.annotator, settle=args.settle)
    what = {
        "saved": f"saved as {outcome.state} ({outcome.kind})",
        "discarded": "left without saving",
        "left": "left without changes",
        "closed": "window closed",
        "conflict": "not saved: someone saved first",
    }
    print(
        f"tile {tile_id}: {what.get(outcome.reason, outcome.reason)}; {outcome.actions} actions, "
        f"{outcome.seconds:.0f} s"
        + ("; your work is kept as a draft" if outcome.draft_kept else "")
    )
    return 0


def cmd_export(args) -> int:
    from labeler.project import open_project
    from labeler.workflow import export_project

    states = [s.strip() for s in args.states.split(",") if s.strip()]
    with open_project(args.dir) as project, _Bar("exporting") as bar:
        out = Path(args.out) if args.out else Path("exports") / project.root.resolve().name
        result = export_project(
            project,
            out,
            formats=args.format,
            states=states,
            proposals=args.proposals,
            pixel_coordinates=args.pixel_coordinates,
            progress=bar,
        )
    if args.pixel_coordinates:
        print(
            "warning: --pixel-coordinates writes pixel positions; those files are NOT RFC 7946 GeoJSON"
        )
    print(
        f"exported {result.images} images ({result.tiles_exported} tiles, "
        f"{result.tiles_from_proposals} filled from model proposals) to {result.folder}"
    )
    if result.geojson:
        print(f"  GeoJSON: {len(result.geojson)} files, {result.features} features")
    if result.masks:
        print(f"  PNG class masks: {len(result.masks)}; manifest: {result.manifest}")
    if result.skipped:
        print(
            f"  nothing to export for: {', '.join(result.skipped)} (no tile in states {', '.join(states)})"
        )
    if result.tiles_from_proposals:
        print("  note: proposal-filled areas are model output, not checked by an annotator")
    return 0


def cmd_import(args) -> int:
    from labeler.project import open_project
    from labeler.workflow import import_masks

    with open_project(args.dir) as project, _Bar("importing") as bar:
        result = import_masks(
            project,
            args.files,
            annotator=args.annotator,
            image=args.image,
            fill=args.fill,
            progress=bar,
        )
    for path, name in result.files:
        print(f"{path} -> image {name}")
    print(
        f"imported {result.full_tiles} full tiles and {result.weak_tiles} partial tiles (weak labels) "
        f"as {args.annotator}; {result.empty_tiles} tiles not covered"
    )
    return 0


def cmd_queue(args) -> int:
    from labeler.tui import run_queue

    return int(run_queue(args.dir, annotator=args.annotator) or 0)


def cmd_propose(args) -> int:
    from labeler.project import open_project
    from labeler.workflow import propose

    with open_project(args.dir) as project, _Bar("proposing") as bar:
        result = propose(project, progress=bar)
    how = (
        "cold start (vegetation index and crop rows)"
        if result.mode == "cold_start"
        else "trained head"
    )
    print(
        f"proposed {result.proposed} tiles with {result.model_version.name} ({how}); "
        f"{result.up_to_date} tiles were already up to date"
    )
    if result.mode == "cold_start":
        print(
            "the cold start proposes crop on rows and weed between rows; it never proposes symptom"
        )
    return 0


def format_iou(val_iou: dict, miou) -> str:
    parts = [f"{name} {'-' if v is None else f'{v:.3f}'}" for name, v in val_iou.items()]
    return "validation IoU: " + ", ".join(parts) + ("" if miou is None else f"; mIoU {miou:.3f}")


def cmd_retrain(args) -> int:
    from labeler.project import open_project
    from labeler.workflow import retrain

    with open_project(args.dir) as project, _Bar("training") as bar:
        result = retrain(project, progress=bar)
    mv = result.model_version
    print(
        f"trained {mv.name} on {result.n_full} full masks and {result.n_scribble} scribbled tiles "
        f"({result.n_train} training, {result.n_val} validation tiles; best epoch {result.best_epoch})"
    )
    print(format_iou(mv.val_iou or {}, mv.miou))
    print("run 'labeler propose' to refresh the proposals with it")
    return 0


# -- parser -----------------------------------------------------------------------------
def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="labeler",
        description="Pixel masks of crop, weed and disease symptom regions from field imagery.",
        epilog=EPILOG,
    )
    parser.add_argument("--version", action="version", version=f"labeler {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    p = sub.add_parser(
        "init",
        help="create a project folder",
        description="Create a project folder "
        "with a commented settings file (labeler.toml) and an empty store.",
    )
    p.add_argument("dir", metavar="DIR", help="project folder to create")
    p.set_defaults(func=cmd_init)

    p = sub.add_parser(
        "add",
        help="add images to a project",
        description="Add PNG, JPEG, TIFF or GeoTIFF "
        "images. Each image is checked, copied into the project and cut into tiles, all or "
        "nothing; an image already present (same content) is skipped.",
    )
    p.add_argument("dir", metavar="DIR", help="project folder")
    p.add_argument("images", metavar="IMAGE", nargs="+", help="image files")
    p.add_argument(
        "--in-place",
        action="store_true",
        help="refer to the files where they are instead of copying",
    )
    p.set_defaults(func=cmd_add)

    p = sub.add_parser(
        "status",
        help="tiles per state, image and annotator",
        description="Show tiles per state, per image and per annotator.",
    )
    p.add_argument("dir", metavar="DIR", help="project folder")
    p.set_defaults(func=cmd_status)

    p = sub.add_parser(
        "demo",
        help="build a demo project from demo_fields/",
        description="Build a demo project from the invented plots in demo_fields/ and show "
        "its status.",
    )
    p.add_argument(
        "--out",
        default="demo-project",
        metavar="DIR",
        help="project folder to build (default: %(default)s)",
    )
    p.add_argument(
        "--fields",
        default=None,
        metavar="DIR",
        help="folder of demo plots (default: the repository's demo_fields/)",
    )
    p.add_argument(
        "--fresh", action="store_true", help="delete an earlier demo project in DIR first"
    )
    p.add_argument("--setup-only", action="store_true", help="only build the project; skip the demo round")
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser(
        "propose",
        help="propose masks (cold start, or the newest trained model)",
        description="Propose a mask for every tile whose proposal is older than the newest model. "
        "Before any model is trained, a vegetation index (ExG - ExR) and the crop rows give the cold "
        "start: vegetation on a row is crop, between rows weed. " + EPILOG,
    )
    p.add_argument("dir", metavar="DIR", help="project folder")
    p.set_defaults(func=cmd_propose)

    p = sub.add_parser(
        "retrain",
        help="train a new model on every saved mask and scribble",
        description="Train a new proposal head on every saved full mask (accepted, amended, settled, "
        "imported) and every scribble; prints the per-class validation IoU.",
    )
    p.add_argument("dir", metavar="DIR", help="project folder")
    p.set_defaults(func=cmd_retrain)

    p = sub.add_parser(
        "pick",
        help="order the queue: most informative tiles first",
        description="Rank every proposed tile with the active-learning picker and write the "
        "queue order (with each tile's score and reason) to the store.",
    )
    p.add_argument("dir", metavar="DIR", help="project folder")
    p.add_argument(
        "--strategy",
        choices=STRATEGIES,
        default=None,
        help="random, entropy, margin, bald, coreset or mixed (default: the project setting, mixed)",
    )
    p.add_argument(
        "--k",
        type=_positive_int,
        default=None,
        metavar="N",
        help="batch size (default: the setting, 20)",
    )
    p.add_argument(
        "--seed", type=int, default=None, help="seed for the random strategy (default: the setting)"
    )
    p.set_defaults(func=cmd_pick)

    p = sub.add_parser(
        "edit",
        help="open a tile in the mask editor",
        description="Open a tile in the mask editor window (needs a display). Enter saves: "
        "'accepted' when the proposal is kept, 'amended' when changed. A draft is autosaved; "
        "a save after someone else's is refused and kept as a draft.",
    )
    p.add_argument("dir", metavar="DIR", help="project folder")
    p.add_argument(
        "tile",
        metavar="TILE",
        nargs="?",
        type=int,
        default=None,
        help="tile id (see 'labeler pick')",
    )
    p.add_argument("--annotator", required=True, metavar="NAME", help="who is annotating")
    p.add_argument(
        "--next", action="store_true", help="open the next tile of the queue for this annotator"
    )
    p.add_argument(
        "--settle",
        action="store_true",
        help="as a reviewer, decide a contested tile (starts from the STAPLE consensus, shows both masks)",
    )
    p.set_defaults(func=cmd_edit)

    p = sub.add_parser(
        "export",
        help="write GeoJSON polygons, PNG class masks and a manifest",
        description="Export saved masks as RFC 7946 GeoJSON (WGS 84 longitude/latitude; one file per "
        "image and one for the project) and as PNG class masks with colour previews and a JSON-lines "
        "manifest for training. " + EPILOG,
    )
    p.add_argument("dir", metavar="DIR", help="project folder")
    p.add_argument(
        "--format",
        choices=("geojson", "masks", "all"),
        default="all",
        help="what to write (default: all)",
    )
    p.add_argument(
        "--states",
        default="accepted,amended,settled",
        help="tile states whose masks are exported (default: %(default)s)",
    )
    p.add_argument(
        "--proposals",
        action="store_true",
        help="fill tiles without a saved mask with the newest model proposal (marked as such)",
    )
    p.add_argument(
        "--pixel-coordinates",
        action="store_true",
        help="allow images without georeferencing: pixel positions, NOT RFC 7946 GeoJSON",
    )
    p.add_argument(
        "--out",
        default=None,
        metavar="FOLDER",
        help="output folder (default: exports/<project name>)",
    )
    p.set_defaults(func=cmd_export)

    p = sub.add_parser(
        "import",
        help="read PNG class masks or GeoJSON polygons as annotations",
        description="Import masks made elsewhere as annotations of a named annotator. A mask file is "
        "matched to its image by name (<image>.png, <image>_mask.png, <image>_annotation.png, "
        "<image>.geojson) or by --image. Nothing is imported when any file has a problem.",
    )
    p.add_argument("dir", metavar="DIR", help="project folder")
    p.add_argument("files", metavar="FILE", nargs="+", help="PNG or GeoJSON mask files")
    p.add_argument("--annotator", required=True, metavar="NAME", help="whose masks these are")
    p.add_argument("--image", default=None, metavar="NAME", help="the image of a single mask file")
    p.add_argument(
        "--fill",
        choices=("unlabelled", "soil"),
        default="unlabelled",
        help="GeoJSON: pixels outside every polygon are unlabelled (default) or soil",
    )
    p.set_defaults(func=cmd_import)

    p = sub.add_parser(
        "queue",
        help="the terminal queue: work through tiles, watch agreement and models",
        description="Open the terminal queue: tiles in picker order with a colour preview; accept, "
        "park, open the editor, re-rank and retrain from the keyboard (press ? for the keys).",
    )
    p.add_argument("dir", metavar="DIR", help="project folder")
    p.add_argument("--annotator", required=True, metavar="NAME", help="who is annotating")
    p.set_defaults(func=cmd_queue)

    p = sub.add_parser(
        "agreement",
        help="how well annotators agree: table, HTML report, CSV",
        description="Compare the masks of annotators who labelled the same images: Cohen's kappa "
        "with its Landis & Koch band and IoU per annotator pair and class. Writes an HTML report "
        "with plots and a CSV of every figure.",
    )
    p.add_argument("dir", metavar="DIR", help="project folder")
    p.add_argument(
        "--since", default=None, metavar="DATE", help="only saves on or after DATE (YYYY-MM-DD)"
    )
    p.add_argument(
        "--out",
        default=None,
        metavar="FOLDER",
        help="report folder (default: DIR/reports/agreement)",
    )
    p.set_defaults(func=cmd_agreement)
    return parser


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected at least 1, got {value}")
    return value


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except LabelerError as exc:
        print(f"labeler: error: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("labeler: interrupted; saved work is kept", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
