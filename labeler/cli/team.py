"""The commands of a project and its team: make it, join it, free a tile, upgrade it.

Like :mod:`labeler.cli.commands`, each takes the parsed arguments
(:mod:`labeler.cli.arguments`), calls :mod:`labeler.project` or :mod:`labeler.workflow`,
prints the result and returns the exit code.
"""

from __future__ import annotations

__all__ = ["cmd_init", "cmd_join", "cmd_release", "cmd_upgrade"]


def cmd_init(args) -> int:
    from labeler.project import init_project

    with init_project(args.dir, store_url=args.store_url, image_root=args.image_root) as project:
        print(f"created project {project.root} (settings in {project.root / 'labeler.toml'})")
        if args.store_url:
            print(
                f"its database: {project.database_name}; teammates run "
                f"'labeler join DIR --store URL' with the same URL"
            )
    return 0


def cmd_join(args) -> int:
    from labeler.project import join_project
    from labeler.workflow import project_status

    with join_project(args.dir, store_url=args.store_url, image_root=args.image_root) as project:
        print(
            f"joined the shared project at {project.database_name}: working folder "
            f"{project.root}, {project_status(project).images} images"
        )
    return 0


def _login_name() -> str:
    import getpass

    try:
        return getpass.getuser()
    except (KeyError, OSError):  # no login name known (a bare container)
        return "unknown"


def cmd_release(args) -> int:
    from labeler.project import open_project
    from labeler.workflow import release_tile

    with open_project(args.dir) as project:
        holder, state = release_tile(project, args.tile, by=args.by or _login_name())
    if holder is None:
        print(f"tile {args.tile} was not held; it stays {state}")
    else:
        print(f"tile {args.tile}: released from {holder}; now {state}")
    return 0


def cmd_upgrade(args) -> int:
    from labeler.project import open_project, upgrade_project

    before, after, backup = upgrade_project(args.dir)
    with open_project(args.dir) as project:  # this machine's model files, read in once
        read_in = project.read_in_model_files()
    if read_in:
        print(f"{args.dir}: model weights read into the database: {', '.join(read_in)}")
    if before == after:
        if not read_in:
            print(f"{args.dir}: the database is at schema version {after}; nothing to do")
        return 0
    print(f"{args.dir}: database upgraded from schema version {before} to {after}")
    if backup is not None:
        print(f"the database as it was is kept in {backup}")
    return 0
