"""The commands of ``labeler``: each calls :mod:`labeler.workflow` and prints the result.

The commands that make, join and keep up a shared project (init, join, release, upgrade)
are in :mod:`labeler.cli.team`.

A command takes the parsed arguments (:mod:`labeler.cli.arguments`) and returns the exit
code; a :class:`labeler.errors.LabelerError` it raises becomes one line on stderr
(:func:`labeler.cli.main`).
"""

from __future__ import annotations

import sys
from collections.abc import Sequence
from pathlib import Path

from labeler.errors import LabelerError

__all__ = [
    "cmd_add",
    "cmd_adapt",
    "cmd_status",
    "cmd_demo",
    "cmd_pick",
    "cmd_agreement",
    "cmd_edit",
    "cmd_export",
    "cmd_import",
    "cmd_queue",
    "cmd_propose",
    "cmd_retrain",
    "format_status",
    "format_effort",
]


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
def cmd_add(args) -> int:
    from labeler.project import open_project
    from labeler.workflow import add_images

    done = []  # reported even when a later image stops the run with an error
    try:
        with open_project(args.dir) as project, _Bar("adding") as bar:
            add_images(
                project,
                args.images,
                copy=not args.in_place,
                keep_going=True,
                on_result=done.append,
                captured=args.date,
                progress=bar,
            )
    finally:
        for r in done:
            taken = ""
            if r.captured is not None:
                how = "as given" if r.date_source == "given" else f"from its {r.date_source} tag"
                taken = f", taken {r.captured.isoformat()} ({how})"
            if r.status == "added":
                print(f"added {r.name}: {r.tiles} tiles{taken}")
            elif r.status == "skipped":
                print(r.message + taken)
            else:
                print(f"labeler: error: {r.message}", file=sys.stderr)
    failed = [r for r in done if r.status == "failed"]
    if failed and len(done) > 1:
        added = sum(r.status == "added" for r in done)
        print(
            f"{added} of {len(done)} images added; {len(failed)} could not be used (nothing of "
            "them was kept)"
        )
    return 1 if failed else 0


def format_status(st) -> str:
    from labeler.states import STATES

    out = [f"project {st.folder}: {st.images} images, {st.tiles} tiles"]
    if st.shared:
        out.append("shared project: the database is on a server (labeler join DIR --store URL)")
    if st.image_root is not None:
        out.append(f"shared image root on this machine: {st.image_root}")
    if st.weights_missing:
        out.append(
            "model weights not in the database yet: " + ", ".join(st.weights_missing)
            + " (run 'labeler upgrade DIR' on the machine that made them)"
        )
    if st.latest_model:
        miou = "" if st.latest_miou is None else f", validation mIoU {st.latest_miou:.3f}"
        out.append(f"model versions: {st.model_versions} (newest {st.latest_model}{miou})")
    head = st.proposing_head or "cold start (no trained head yet)"
    out.append(f"propose uses: {head} on encoder {st.proposing_encoder}")
    if st.newest_encoder != st.proposing_encoder:
        out.append(f"newest encoder: {st.newest_encoder} (used by the next retrain)")
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
    if st.holds:
        out.append("")
        out.append("held tiles (a hold lapses without a heartbeat from its editor)")
        out.append(
            _table(
                ["tile", "held by", "minutes left"],
                [(tid, who, f"{max(left, 0.0):.1f}") for tid, who, left in st.holds],
            )
        )
    if st.team:
        out.append("")
        where = "the team's, kept in the database" if st.shared else "recorded at init"
        out.append(f"shared settings ({where})")
        rows = [
            (
                "classes",
                ", ".join(
                    f"{i['index']}={n}"
                    for n, i in sorted(
                        st.team.get("classes", {}).items(), key=lambda kv: kv[1]["index"]
                    )
                ),
            )
        ]
        for section in ("tiles", "agreement", "picker"):
            opts = st.team.get(section, {})
            rows.append((section, ", ".join(f"{k}={v}" for k, v in opts.items())))
        out.append(_table(["section", "options"], rows))
    out.append("")
    out.append("per annotator")
    if st.by_annotator:
        out.append(
            _table(
                ["annotator", "tiles saved", "weak labels saved", "actions", "minutes"],
                [
                    (
                        a,
                        int(d["tiles"]),
                        int(d["weak_labels"]),
                        int(d["actions"]),
                        f"{d['seconds'] / 60:.1f}",
                    )
                    for a, d in sorted(st.by_annotator.items())
                ],
            )
        )
    else:
        out.append("(no annotations yet)")
    out.append("")
    out.append("effort per model version (saves started from its proposals)")
    out.append(format_effort(st.effort))
    return "\n".join(out)


def format_effort(rows) -> str:
    """The effort table: per model version, median actions and seconds per saved tile and
    the share accepted unchanged (rows of :func:`labeler.workflow.effort_by_model`)."""
    if not rows:
        return "(no save from a proposal yet)"
    return _table(
        ["model", "saves", "median actions", "median seconds", "accepted unchanged"],
        [
            (r.model, r.saves, f"{r.median_actions:g}", f"{r.median_seconds:.1f}",
             f"{100 * r.accepted_share:.0f} %")
            for r in rows
        ],
    )


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


def _cluster_address(args, project) -> str | None:
    """``--cluster``, else the ``cluster.address`` setting; None to work here."""
    return getattr(args, "cluster", None) or project.settings.cluster.address or None


def cmd_pick(args) -> int:
    from labeler.project import open_project
    from labeler.workflow import pick_tiles

    with open_project(args.dir) as project, _Bar("picking") as bar:
        result = pick_tiles(
            project,
            strategy=args.strategy,
            k=args.k,
            seed=args.seed,
            progress=bar,
            cluster=_cluster_address(args, project),
        )
    if result.note:
        print(f"note: {result.note}")
    print(
        f"picked from {len(result.items)} tiles with strategy {result.strategy}; "
        f"the next batch of {result.k}:"
    )
    scores = [t.score for t in result.batch]
    by_score = all(b <= a for a, b in zip(scores[:-1], scores[1:], strict=True))
    rows = [
        (
            t.rank + 1,
            t.tile_id,
            t.image,
            f"{t.row},{t.col}",
            f"{t.score:.4f}" if by_score else f"pick {t.rank + 1} \u00b7 {t.score:.4f}",
            t.reason,
        )
        for t in result.batch
    ]
    column = "score" if by_score else "ranked by"
    print(_table(["rank", "tile", "image", "row,col", column, "why"], rows))
    if not by_score:
        print(
            "the ranks follow the order of picking: each tile was picked unlike the tiles "
            "picked before it, its score weighed by that distance, so a later pick may "
            "score higher"
        )
    if result.without_proposal:
        print(
            f"{result.without_proposal} tiles have no proposal yet and are left out "
            "(run 'labeler propose')"
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
    from labeler.editor.opening import edit_tile
    from labeler.editor.sequence import edit_in_turn
    from labeler.project import open_project
    from labeler.states import KIND_FULL, KIND_WEAK

    if args.tile is None and not args.next:
        raise LabelerError("edit: name a TILE id or pass --next for the next tile of your queue")
    if args.tile is not None and args.next:
        raise LabelerError("edit: give either a TILE id or --next, not both")
    what = {
        # the state the store recorded, as the workflow decided it (never the editor's)
        "discarded": "left without saving",
        "left": "left without changes",
        "closed": "window closed",
        "conflict": "not saved: someone saved first",
    }

    def report(tile_id, outcome) -> None:
        kind = {KIND_FULL: "full mask", KIND_WEAK: "weak label"}.get(outcome.kind, outcome.kind)
        said = f"saved as {outcome.state} ({kind})" if outcome.saved else what.get(
            outcome.reason, outcome.reason
        )
        print(
            f"tile {tile_id}: {said}; {outcome.actions} actions, {outcome.seconds:.0f} s"
            + ("; your work is kept as a draft" if outcome.draft_kept else ""),
            flush=True,
        )

    with open_project(args.dir) as project:
        if args.next and not args.settle:
            done, exhausted = edit_in_turn(project, args.annotator, report=report)
            saved = sum(1 for _, o in done if o.saved)
            end = "nothing is left for you" if exhausted else "stopped"
            print(f"{saved} of {len(done)} tiles saved; {end}")
            return 0
        tile_id, outcome = edit_tile(project, args.tile, args.annotator, settle=args.settle)
    report(tile_id, outcome)
    return 0


def cmd_export(args) -> int:
    from labeler.project import open_project
    from labeler.workflow import export_project
    from labeler.workflow.exporting import empty_export_hints

    states = [s.strip() for s in args.states.split(",") if s.strip()]
    with open_project(args.dir) as project, _Bar("exporting") as bar:
        out = Path(args.out) if args.out else project.root / "exports"
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
        print(
            f"  GeoJSON: {len(result.geojson)} files, {result.features} class features and "
            f"{result.footprints} outlines of saved tiles (layer looked_at)"
        )
    if result.masks:
        print(f"  PNG class masks: {len(result.masks)}; manifest: {result.manifest}")
    if result.skipped:
        print(
            f"  nothing to export for: {', '.join(result.skipped)} (no tile in states {', '.join(states)})"
        )
    if result.images == 0:
        for line in empty_export_hints(states, proposals=args.proposals):
            print(f"  hint: {line}")
    if result.tiles_from_proposals:
        print(
            "  note: proposal-filled areas are model output, not checked by an annotator; "
            "masks/<image>_source.png marks them per pixel (2) and each manifest row gives "
            "its proposal_share"
        )
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
            replace=args.replace,
            progress=bar,
        )
    for line in result.summary_lines():
        print(line)
    return 0


def cmd_queue(args) -> int:
    from labeler.tui import run_queue

    return int(run_queue(args.dir, annotator=args.annotator) or 0)


def cmd_propose(args) -> int:
    from labeler.project import open_project
    from labeler.workflow import propose
    from labeler.workflow.naming import model_label
    from labeler.workflow.views import model_versions

    with open_project(args.dir) as project, _Bar("proposing") as bar:
        result = propose(project, progress=bar, cluster=_cluster_address(args, project))
        label = model_label(result.model_version, model_versions(project))
    how = (
        "cold start (vegetation index and crop rows)"
        if result.mode == "cold_start"
        else "trained head"
    )
    print(
        f"proposed {result.proposed} tiles with {label} ({how}); "
        f"{result.up_to_date} tiles were already up to date"
    )
    if result.mode == "cold_start":
        print(
            "the cold start proposes crop on rows and weed between rows; it never proposes symptom"
        )
    return 0


def cmd_retrain(args) -> int:
    from labeler.metrics import format_iou
    from labeler.project import open_project
    from labeler.workflow import renew_proposals, retrain

    with open_project(args.dir) as project:
        with _Bar("training") as bar:
            result = retrain(project, encoder=args.encoder, progress=bar)
        with _Bar("renewing proposals") as bar:
            renewed = renew_proposals(project, progress=bar)
    mv = result.model_version
    print(
        f"trained {mv.name} on {result.n_full} full masks and {result.n_weak} weak labels "
        f"({result.n_train} training, {result.n_val} validation tiles; weights of epoch {result.best_epoch} kept)"
    )
    print(f"validation IoU: {format_iou(mv.val_iou, miou=mv.miou)}")
    tuned = f"; encoder stages tuned: {result.tuned_stages}" if result.tuned_stages else ""
    print(f"took {result.seconds:.1f} s ({result.steps} optimiser steps{tuned})")
    print(_renewal_line(renewed, mv.name))
    return 0


def _renewal_line(renewed, name: str) -> str:
    """One line on the proposals renewed after a retrain."""
    p = renewed.proposals
    line = f"renewed the proposals of {p.proposed} tiles with {name} in {renewed.seconds:.1f} s"
    if p.left_alone:
        line += f"; {p.left_alone} tiles with a saved mask or held by someone keep theirs"
    if renewed.picked is not None:
        line += "; the queue is re-picked"
    elif renewed.note:
        line += f"; the queue was not re-picked ({renewed.note})"
    return line


def cmd_adapt(args) -> int:
    from labeler.project import open_project
    from labeler.workflow import adapt

    with open_project(args.dir) as project, _Bar("adapting") as bar:
        try:
            result = adapt(
                project,
                minutes=args.minutes,
                method=args.method,
                start=args.start,
                revisits=not args.no_revisits,
                max_tiles=args.max_tiles,
                seed=args.seed,
                progress=bar,
            )
        except KeyboardInterrupt:
            bar.close()
            print(
                "interrupted: the last checkpoint is kept under models/adapting/; run the same "
                "command again to resume",
                file=sys.stderr,
            )
            return 130
    enc = result.encoder
    resumed = f", resumed from step {result.resumed_from}" if result.resumed_from else ""
    print(
        f"adapted {enc.name} ({enc.encoder_version}) from {result.base_version} with the "
        f"{result.method} method on {result.tiles} tiles and {result.revisit_pairs} revisit pairs"
    )
    print(
        f"{result.steps} steps in {result.seconds / 60:.1f} min{resumed}; loss "
        f"{result.first_loss:.3f} -> {result.last_loss:.3f} (stopped by the {result.stopped} budget)"
    )
    print("run 'labeler retrain' to train a head on it, then 'labeler propose'")
    return 0
