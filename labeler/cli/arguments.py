"""The argument parser of ``labeler``: one sub-command per stage of the loop."""

from __future__ import annotations

import argparse

from labeler import __version__
from labeler.cli.commands import (
    cmd_adapt,
    cmd_add,
    cmd_agreement,
    cmd_demo,
    cmd_edit,
    cmd_export,
    cmd_import,
    cmd_pick,
    cmd_propose,
    cmd_queue,
    cmd_retrain,
    cmd_status,
)
from labeler.cli.team import cmd_init, cmd_join, cmd_release, cmd_upgrade
from labeler.settings import STRATEGIES

__all__ = ["EPILOG", "build_parser"]

#: The caution every help text ends with.
EPILOG = (
    "Masks are decision support only: before any spraying or fungicide decision, local "
    "regulations and licensed agronomic advice come first."
)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="labeler",
        description="Pixel masks of crop, weed and disease symptom regions from field imagery.",
        epilog=EPILOG,
    )
    parser.add_argument("--version", action="version", version=f"labeler {__version__}")
    parser.add_argument(
        "--debug",
        action="store_true",
        help="on an error, print the traceback before the one-line message",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    p = sub.add_parser(
        "init",
        help="create a project folder",
        description="Create a project folder "
        "with a commented settings file (labeler.toml) and an empty store.",
    )
    p.add_argument("dir", metavar="DIR", help="project folder to create")
    p.add_argument(
        "--store",
        dest="store_url",
        metavar="URL",
        help="keep the project in this database (postgresql+psycopg://user@server/db, "
        "empty) so a team can share it; default labeler.db in DIR",
    )
    _add_image_root(p)
    p.set_defaults(func=cmd_init)

    p = sub.add_parser(
        "join",
        help="work on a shared project from this machine",
        description="Make a working folder on this machine for a project kept in a shared "
        "database (made with 'labeler init DIR --store URL'). The team's settings come from "
        "the database.",
    )
    p.add_argument("dir", metavar="DIR", help="working folder to create")
    p.add_argument(
        "--store", dest="store_url", metavar="URL", required=True, help="the project's database URL"
    )
    _add_image_root(p)
    p.set_defaults(func=cmd_join)

    p = sub.add_parser(
        "release",
        help="give back a tile an editor still holds",
        description="End the hold on a tile (say its editor crashed) whoever holds it; "
        "the tile goes back as if its editor closed without a save. Holds also lapse by "
        "themselves after holds.lease_minutes without a heartbeat.",
    )
    p.add_argument("dir", metavar="DIR", help="project folder")
    p.add_argument("tile", metavar="TILE", type=int, help="tile id (see labeler status)")
    p.add_argument(
        "--by", metavar="NAME", help="who releases it, for the log (default: your login name)"
    )
    p.set_defaults(func=cmd_release)

    p = sub.add_parser(
        "upgrade",
        help="bring a project's database up to this release",
        description="Upgrade the project's database to this release's schema (Alembic "
        "migrations). A SQLite database is copied beside itself first; on a server, take a "
        "pg_dump first.",
    )
    p.add_argument("dir", metavar="DIR", help="project folder")
    p.set_defaults(func=cmd_upgrade)

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
    p.add_argument(
        "--date",
        type=_iso_date,
        default=None,
        metavar="YYYY-MM-DD",
        help="the day the images were taken (default: the date in their TIFF/EXIF tags, if "
        "any); images of the same ground on other dates train 'labeler adapt'",
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
    p.add_argument(
        "--setup-only", action="store_true", help="only build the project; skip the demo round"
    )
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser(
        "propose",
        help="propose masks (cold start, or the newest trained model)",
        description="Propose a mask for every tile whose proposal is older than the newest model. "
        "Before any model is trained, a vegetation index (ExG - ExR) and the crop rows give the cold "
        "start: vegetation on a row is crop, between rows weed. " + EPILOG,
    )
    p.add_argument("dir", metavar="DIR", help="project folder")
    _cluster_option(p)
    p.set_defaults(func=cmd_propose)

    p = sub.add_parser(
        "retrain",
        help="train a new model on every saved mask and weak label",
        description="Train a new proposal head on every saved full mask (accepted, amended, settled, "
        "imported) and every weak label; prints the per-class validation IoU, then gives every "
        "tile without a saved mask that nobody holds a new proposal from it and re-picks the "
        "queue.",
    )
    p.add_argument("dir", metavar="DIR", help="project folder")
    p.add_argument(
        "--encoder",
        default=None,
        metavar="VERSION",
        help="encoder version to train the head on: 'imagenet', a name such as encoder-2 "
        "('labeler status' lists them) or a version string; default the newest",
    )
    p.set_defaults(func=cmd_retrain)

    p = sub.add_parser(
        "adapt",
        help="adapt the encoder to the project's own tiles, without labels",
        description="Train the encoder on the project's tiles (labelled or not) without labels, "
        "within a time budget: two views of each tile (flips, quarter turns, scale, sun and "
        "shade), and the same ground on two dates where the project has revisits, are pulled "
        "together. Keeps a checkpoint every few minutes; Ctrl-C keeps the last one and the same "
        "command resumes. The result is a new encoder version; the next 'labeler retrain' "
        "uses it.",
    )
    p.add_argument("dir", metavar="DIR", help="project folder")
    p.add_argument(
        "--minutes",
        type=_positive_float,
        default=10.0,
        metavar="M",
        help="time budget of the whole run in minutes (default: %(default)s)",
    )
    p.add_argument(
        "--method",
        choices=("dense", "image"),
        default="dense",
        help="dense: features of the same ground agree cell by cell (VICRegL-style, suits "
        "masks; default); image: whole-view contrast (SimCLR's NT-Xent)",
    )
    p.add_argument(
        "--from",
        dest="start",
        default=None,
        metavar="VERSION",
        help="encoder version to start from: 'imagenet', a name such as encoder-2 "
        "(default: the newest)",
    )
    p.add_argument(
        "--no-revisits",
        action="store_true",
        help="ignore images of the same ground on other dates",
    )
    p.add_argument(
        "--max-tiles",
        type=_positive_int,
        default=512,
        metavar="N",
        help="read at most N tiles, a seeded sample (default: %(default)s)",
    )
    p.add_argument("--seed", type=int, default=0, help="seed of the sample and the run")
    p.set_defaults(func=cmd_adapt)

    p = sub.add_parser(
        "pick",
        help="order the queue: most informative tiles first",
        description="Pick with the active-learning picker: put every proposed tile in order and "
        "write the queue order (with each tile's score and reason) to the store.",
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
    _cluster_option(p)
    p.set_defaults(func=cmd_pick)

    p = sub.add_parser(
        "edit",
        help="open a tile in the mask editor",
        description="Open a tile in the mask editor window (needs a display). Enter saves the "
        "mask, recorded as 'accepted' when the proposal is kept, 'amended' when changed "
        "('settled' with --settle, after a y to confirm); k saves the weak label alone (state 'weak'). The state "
        "recorded is printed. A draft is autosaved; a save after someone else's is refused "
        "and kept as a draft.",
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
        "--next",
        action="store_true",
        help="edit the next tiles of the queue one after another: a save opens the next tile, "
        "leaving a tile without a save (Esc, closing the window) stops",
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
        default="accepted,amended,imported,settled",
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
        help="output folder (default: DIR/exports, inside the project)",
    )
    p.set_defaults(func=cmd_export)

    p = sub.add_parser(
        "import",
        help="read PNG class masks or GeoJSON polygons as annotations",
        description="Import masks made elsewhere as saves of a named annotator, tile by tile. A mask "
        "file is matched to its image by name (<image>.png, <image>_mask.png, "
        "<image>_annotation.png, <image>.geojson) or by --image. Reviewed work (tiles a reviewer "
        "settled, masks another annotator saved) is skipped and listed unless --replace is given; "
        "contested tiles and tiles saved by someone else while the import runs are always "
        "skipped. Nothing is imported when any file has a problem.",
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
    p.add_argument(
        "--replace",
        action="store_true",
        help="also replace reviewed work (settled tiles, other annotators' masks); the "
        "replaced versions stay in the history",
    )
    p.set_defaults(func=cmd_import)

    p = sub.add_parser(
        "queue",
        help="the terminal queue: work through tiles, watch agreement and models",
        description="Open the terminal queue: tiles in picker order with a colour preview; accept, "
        "park, open the editor, re-pick and retrain from the keyboard (press ? for the keys).",
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


def _positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not value > 0:
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}")
    return value


def _iso_date(text: str):
    from datetime import date

    try:
        return date.fromisoformat(text)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected a date like 2027-05-14 (YYYY-MM-DD), got {text!r}"
        ) from None


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected at least 1, got {value}")
    return value


def _cluster_option(p: argparse.ArgumentParser) -> None:
    """``--cluster ADDRESS``: send the work to the workers of a Dask scheduler."""
    p.add_argument(
        "--cluster",
        metavar="ADDRESS",
        default=None,
        help="send the work to the workers of a running Dask scheduler, e.g. "
        "tcp://10.0.0.5:8786 (default: the cluster.address setting; none: work here); "
        "needs pip install 'labeler[cluster]'",
    )


def _add_image_root(p: argparse.ArgumentParser) -> None:
    """The ``--image-root`` option of ``init`` and ``join``."""
    p.add_argument(
        "--image-root",
        dest="image_root",
        metavar="FOLDER",
        help="the team's shared image folder as this machine mounts it (store.image_root): "
        "added images are kept there under their SHA-256 and found by every machine",
    )
