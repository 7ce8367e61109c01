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
    from labeler.demo.build import build_demo_project

    with _Bar("demo") as bar:
        project, lines = build_demo_project(
            Path(args.out),
            fields=None if args.fields is None else Path(args.fields),
            fresh=args.fresh,
            progress=bar,
        )
    with project:
        from labeler.workflow import project_status

        for line in lines:
            print(line)
        print()
        print(format_status(project_status(project)))
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
    p.set_defaults(func=cmd_demo)

    for extra in _EXTRA_COMMANDS:
        extra(sub)
    return parser


#: Functions adding further sub-commands (filled in by later parts of the package).
_EXTRA_COMMANDS: list = []


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
