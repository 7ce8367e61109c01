"""Project settings: ``<project>/labeler.toml`` plus ``LABELER_*`` environment, read once.

Every option has a default, so an empty settings file is a valid project. The file is
TOML with one table per section; an environment variable
``LABELER_<SECTION>_<OPTION>`` (upper case) overrides the file, e.g.
``LABELER_STORE_URL=postgresql+psycopg://...`` or ``LABELER_MODEL_MC_SAMPLES=4``.

Sections and options (defaults in brackets):

``[store]``
    ``url`` [``sqlite:///<project>/labeler.db``] database URL (SQLAlchemy form);
    ``image_root`` [""] where this machine reaches the team's shared image folder (a
    mounted network folder); ``add`` keeps each image there under its SHA-256 and every
    machine finds it there (nothing: images are copied into the project's ``images/``).
``[tiles]``
    ``size`` [256] tile edge in pixels; ``overlap`` [32] pixels shared by neighbours;
    ``max_image_px`` [2500000000] largest image (width x height) ``add`` accepts, checked
    from the file's header before any tile is made (2.5 Gpx: 50000 x 50000, about 50 000
    tiles, 25 ha at 1 cm per pixel; commands keep a few KB per tile, so memory stays
    within bounds up to there).
``[cold_start]``
    ``exr_coefficient`` [1.4] red weight of ExR (Meyer & Neto 2008; 1.3 is the older
    form); ``threshold`` ["zero"] ``"zero"`` (ExG - ExR > 0) or ``"otsu"``;
    ``min_object_px`` [24] vegetation specks smaller than this are dropped.
``[model]``
    ``mc_samples`` [8] MC-dropout passes for uncertainty; ``seed`` [0]; ``epochs`` [40]
    upper bound, the step budget decides; ``batch_size`` [4] tiles per optimiser step;
    ``min_labelled_tiles`` [3] fewest labelled tiles ``retrain`` accepts; ``val_share``
    [0.2] held-out slice whose IoU ``retrain`` reports; ``threads`` [0] torch threads (0 = the free cores); ``augment`` ["auto"]
    how ``retrain`` augments: ``"turns"`` the flips and quarter turns of each labelled
    tile, encoded once and cached (exact, fast), ``"images"`` flips, turns and
    colour-jitters the tiles and passes them through the encoder every step (slow),
    ``"features"`` turns the cached features (approximate), ``"auto"`` turns;
    ``patience`` [10] epochs without a lower validation loss before training stops, when
    early stopping is asked for (``retrain`` keeps the state at the end of the step
    budget: a few labelled tiles give too noisy a validation loss to choose by); ``finetune_stages`` [0] encoder
    stages trained with the head on the project's labels: 0 (frozen encoder), 2 or 4
    (the last stages, at a tenth of the head's learning rate; a new encoder version);
    ``precision`` ["auto"] arithmetic of ``propose``: bfloat16 where the CPU has it
    natively, else float32 (same weights and encoder version), or "float32"/"bfloat16".
    ``train_precision`` ["auto"] arithmetic of the training steps' convolutions:
    ``"bfloat16"`` (about 1.4 x faster steps on CPUs with native bfloat16, same proposal
    quality on the demo plots), ``"float32"``, or ``"auto"``: bfloat16 where the CPU has
    it natively, else float32. Weights, losses and proposals stay float32.
``[picker]``
    ``strategy`` ["mixed"] one of random, entropy, margin, bald, coreset, mixed;
    ``k`` [20] tiles per batch; ``seed`` [0].
``[agreement]``
    ``overlap_share`` [0.1] share of tiles given to several annotators;
    ``annotators_per_tile`` [2]; ``metric`` ["kappa"] ``"kappa"`` or ``"iou"``;
    ``threshold`` [0.6] tiles agreeing less become ``contested``; ``reviewers`` [""]
    comma-separated names of those who settle contested tiles (empty: anyone who did not
    annotate the tile).
``[export]``
    ``simplify_tolerance_px`` [0.5]; ``min_area_px`` [8]; ``val_share`` [0.2] share of
    spatial blocks in the manifest's val split; ``seed`` [0]; ``block_tiles`` [4] side of
    a split block, in tiles.
``[editor]``
    ``autosave_seconds`` [5]; ``opacity`` [0.45].
``[preview]``
    ``graphics`` ["auto"] preview pictures: kitty, sixel, off (half blocks), auto (by TERM).
``[holds]``
    ``lease_minutes`` [30] a hold lapses after this long without a heartbeat from its
    editor (by the database's clock); ``heartbeat_seconds`` [60] how often an open
    editor renews its hold.
``[cluster]``
    ``address`` [""] a Dask scheduler (``tcp://host:8786``) that ``propose`` and ``pick``
    send their work to (nothing: work here; ``--cluster`` overrides); ``connect_timeout``
    [10] seconds to wait for the scheduler; ``worker_threads`` [0] torch threads per task
    on a worker (0 = the worker machine's cores shared among its task threads);
    ``worker_cache`` [""] feature-cache folder on each worker (nothing: a folder in the
    worker's temporary directory).
``[classes]``
    optional table ``name = {index = i, colour = "#RRGGBB"}`` replacing the default schema
    of :mod:`labeler.classes`.

Every value is checked when the settings are read (:data:`RANGES`): numbers must be
finite (no ``nan``, ``inf``, ``1e400``), whole where a count is meant, and inside the
option's range; a bad value is a :class:`~labeler.errors.SettingsError` whose message
starts with where the value came from (``labeler.toml line 12`` or the ``LABELER_*``
variable), so a command never starts on a setting that breaks it half-way.

Retired options (:data:`RETIRED_OPTIONS`) that settings files of older projects still
carry are read and ignored, so those projects keep opening.
"""

from __future__ import annotations

import dataclasses
import os
import re
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

from labeler.classes import DEFAULT_SCHEMA, ClassSchema
from labeler.errors import SettingsError
from labeler.settings_file import default_settings_text
from labeler.settings_values import (
    RANGES,
    Checked,
    Range,
    bad_value,
    check_choice,
    coerce,
    line_of,
)

__all__ = [
    "SETTINGS_FILE",
    "StoreSettings",
    "TileSettings",
    "ColdStartSettings",
    "ModelSettings",
    "PickerSettings",
    "AgreementSettings",
    "ExportSettings",
    "EditorSettings",
    "PreviewSettings",
    "ClusterSettings",
    "Settings",
    "STRATEGIES",
    "AUGMENT_MODES",
    "FINETUNE_STAGES",
    "PRECISIONS",
    "TRAIN_PRECISIONS",
    "RETIRED_OPTIONS",
    "RANGES",
    "Range",
    "load_settings",
    "default_settings_text",
]

#: Name of the settings file inside a project folder.
SETTINGS_FILE = "labeler.toml"

STRATEGIES = ("random", "entropy", "margin", "bald", "coreset", "mixed")
#: Per-pixel uncertainty measures, in the channel order of labeler.picker.uncertainty_maps;
#: the one list of their names (picker, model and workflow use it).
UNCERTAINTY_MEASURES = ("entropy", "margin", "least_confidence", "bald")
#: Augmentation modes of head training (``model.augment``; see labeler.model.train).
AUGMENT_MODES = ("auto", "turns", "features", "images")
#: Encoder stages ``retrain`` may train with the head (``model.finetune_stages``; see
#: labeler.model.tail): none, the last two (6-7) or the last four (4-7).
FINETUNE_STAGES = (0, 2, 4)
#: Arithmetic of the encoder and the head when proposing (``model.precision``; see
#: labeler.model.encoder.resolve_precision): bfloat16 where the CPU has it, or always float32.
PRECISIONS = ("auto", "float32", "bfloat16")
#: Arithmetic of head training's convolutions (``model.train_precision``; see
#: labeler.model.steps): bfloat16 where the CPU has it natively ("auto"), or as named.
TRAIN_PRECISIONS = ("auto", "float32", "bfloat16")


@dataclass(frozen=True)
class StoreSettings(Checked):
    _section = "store"
    url: str = ""
    image_root: str = ""

    def _check(self) -> None:
        if self.url and "://" not in self.url:
            # the value is not shown: a URL may carry a password
            raise SettingsError(
                "store.url: expected a database URL such as "
                "postgresql+psycopg://user@server/labeler (or nothing, for labeler.db in the "
                "project folder), got text without '://'",
                option="store.url",
            )


@dataclass(frozen=True)
class TileSettings(Checked):
    _section = "tiles"
    size: int = 256
    overlap: int = 32
    max_image_px: int = 2_500_000_000

    def _check(self) -> None:
        if not self.overlap < self.size:
            raise bad_value(
                "tiles", "overlap", f"fewer pixels than tiles.size ({self.size})", self.overlap
            )


@dataclass(frozen=True)
class ColdStartSettings(Checked):
    _section = "cold_start"
    exr_coefficient: float = 1.4
    threshold: str = "zero"
    min_object_px: int = 24

    def _check(self) -> None:
        check_choice("cold_start", "threshold", self.threshold, ("zero", "otsu"))


@dataclass(frozen=True)
class ModelSettings(Checked):
    _section = "model"
    mc_samples: int = 8
    seed: int = 0
    epochs: int = 40
    batch_size: int = 4
    min_labelled_tiles: int = 3
    val_share: float = 0.2
    threads: int = 0
    augment: str = "auto"
    patience: int = 10
    finetune_stages: int = 0
    precision: str = "auto"
    train_precision: str = "auto"

    def _check(self) -> None:
        check_choice("model", "augment", self.augment, AUGMENT_MODES)
        check_choice("model", "finetune_stages", self.finetune_stages, FINETUNE_STAGES)
        check_choice("model", "precision", self.precision, PRECISIONS)
        check_choice("model", "train_precision", self.train_precision, TRAIN_PRECISIONS)


@dataclass(frozen=True)
class PickerSettings(Checked):
    _section = "picker"
    strategy: str = "mixed"
    k: int = 20
    seed: int = 0

    def _check(self) -> None:
        check_choice("picker", "strategy", self.strategy, STRATEGIES)


@dataclass(frozen=True)
class AgreementSettings(Checked):
    _section = "agreement"
    overlap_share: float = 0.1
    annotators_per_tile: int = 2
    metric: str = "kappa"
    threshold: float = 0.6
    reviewers: str = ""

    def _check(self) -> None:
        check_choice("agreement", "metric", self.metric, ("kappa", "iou"))
        if self.metric == "iou" and self.threshold < 0:
            raise bad_value("agreement", "threshold", "an IoU between 0 and 1", self.threshold)


@dataclass(frozen=True)
class ExportSettings(Checked):
    _section = "export"
    simplify_tolerance_px: float = 0.5
    min_area_px: float = 8.0
    val_share: float = 0.2
    seed: int = 0
    block_tiles: int = 4


@dataclass(frozen=True)
class HoldSettings(Checked):
    _section = "holds"
    lease_minutes: float = 30.0
    heartbeat_seconds: float = 60.0


@dataclass(frozen=True)
class EditorSettings(Checked):
    _section = "editor"
    autosave_seconds: float = 5.0
    opacity: float = 0.45


@dataclass(frozen=True)
class PreviewSettings(Checked):
    _section = "preview"
    graphics: str = "auto"

    def _check(self) -> None:
        check_choice("preview", "graphics", self.graphics, ("auto", "kitty", "sixel", "off"))


@dataclass(frozen=True)
class ClusterSettings(Checked):
    _section = "cluster"
    address: str = ""
    connect_timeout: float = 10.0
    worker_threads: int = 0
    worker_cache: str = ""


#: Options no version reads any more, per section; a settings file may still hold them.
RETIRED_OPTIONS = {
    "picker": ("vegetation_only",),
    "agreement": ("boundary_tolerance_px",),
}

_SECTIONS = {
    "store": StoreSettings,
    "tiles": TileSettings,
    "cold_start": ColdStartSettings,
    "model": ModelSettings,
    "picker": PickerSettings,
    "agreement": AgreementSettings,
    "export": ExportSettings,
    "editor": EditorSettings,
    "preview": PreviewSettings,
    "holds": HoldSettings,
    "cluster": ClusterSettings,
}


@dataclass(frozen=True)
class Settings:
    """All settings of one project (immutable once read).

    ``origins`` maps ``section.option`` to where a value that is not the default came
    from (``labeler.toml line 12``, ``LABELER_MODEL_EPOCHS``); see :meth:`origin`.
    """

    project: Path = Path(".")
    store: StoreSettings = field(default_factory=StoreSettings)
    tiles: TileSettings = field(default_factory=TileSettings)
    cold_start: ColdStartSettings = field(default_factory=ColdStartSettings)
    model: ModelSettings = field(default_factory=ModelSettings)
    picker: PickerSettings = field(default_factory=PickerSettings)
    agreement: AgreementSettings = field(default_factory=AgreementSettings)
    export: ExportSettings = field(default_factory=ExportSettings)
    editor: EditorSettings = field(default_factory=EditorSettings)
    preview: PreviewSettings = field(default_factory=PreviewSettings)
    holds: HoldSettings = field(default_factory=HoldSettings)
    cluster: ClusterSettings = field(default_factory=ClusterSettings)
    classes: ClassSchema = DEFAULT_SCHEMA
    origins: Mapping[str, str] = field(default_factory=dict, compare=False, repr=False)

    @property
    def db_url(self) -> str:
        """Database URL; the default is the project's own SQLite file."""
        if self.store.url:
            return self.store.url
        return f"sqlite:///{(self.project / 'labeler.db').resolve()}"

    @property
    def cache_dir(self) -> Path:
        """Folder of derivable data (may be deleted at any time)."""
        return self.project / "cache"

    def origin(self, option: str) -> str:
        """Where the value of ``option`` (``"section.option"``) came from.

        Returns
        -------
        str
            ``"<file> line N"``, ``"<file>"``, the ``LABELER_*`` variable's name, or
            ``"default"``.
        """
        return self.origins.get(option, "default")

    def replace(self, **sections: object) -> Settings:
        """A copy with whole sections or single options replaced.

        ``settings.replace(model={"mc_samples": 2})`` changes one option of a section.
        """
        changes: dict[str, object] = {}
        for name, value in sections.items():
            if name in _SECTIONS and isinstance(value, Mapping):
                changes[name] = dataclasses.replace(getattr(self, name), **value)
            else:
                changes[name] = value
        return dataclasses.replace(self, **changes)


def _section_from(
    name: str,
    raw: Mapping[str, object],
    env: Mapping[str, str],
    origins: dict[str, str],
    file_origin,
) -> object:
    cls = _SECTIONS[name]
    kinds = {f.name: f.type for f in dataclasses.fields(cls)}
    pytype = {"int": int, "float": float, "str": str}
    limits = RANGES.get(name, {})
    unknown = set(raw) - set(kinds) - set(RETIRED_OPTIONS.get(name, ()))
    if unknown:
        first = sorted(unknown)[0]
        raise SettingsError(
            f"[{name}]: unknown option(s) {', '.join(sorted(unknown))}; known: {', '.join(kinds)}",
            option=f"{name}.{first}",
            origin=file_origin(name, first),
        )
    values: dict[str, object] = {}
    for option, kind in kinds.items():
        target = pytype[kind if isinstance(kind, str) else kind.__name__]
        where = f"{name}.{option}"
        env_name = f"LABELER_{name}_{option}".upper()
        if env_name in env:
            origins[where] = env_name
            values[option] = coerce(where, env[env_name], target, limits=limits.get(option))
        elif option in raw:
            origins[where] = file_origin(name, option)
            values[option] = coerce(where, raw[option], target, limits=limits.get(option))
    return cls(**values)


def _classes_from(table: object) -> ClassSchema:
    if not isinstance(table, Mapping):
        raise SettingsError(
            f"[classes]: expected a table of classes, got {table!r}", option="classes"
        )
    for name, spec in table.items():
        if not isinstance(spec, Mapping):
            raise SettingsError(
                f'classes.{name}: expected a table like {{ index = 1, colour = "#0072B2" }}, '
                f"got {spec!r}",
                option=f"classes.{name}",
            )
        index = spec.get("index")
        if isinstance(index, bool) or not isinstance(index, int) or not 0 <= index <= 254:
            raise SettingsError(
                f"classes.{name}.index: expected a whole number from 0 to 254 (255 means "
                f"unlabelled), got {index!r}",
                option=f"classes.{name}",
            )
    try:
        return ClassSchema.from_mapping(table)  # type: ignore[arg-type]
    except ValueError as exc:
        m = re.match(r"classes\.(\w+)", str(exc))
        raise SettingsError(str(exc), option=m.group(0) if m else "classes") from None


def _read_text(path: Path) -> str | None:
    """The settings file's text, or None when there is none."""
    try:
        return path.read_text(encoding="utf-8")
    except FileNotFoundError:
        return None
    except IsADirectoryError:
        raise SettingsError(
            f"{path}: is a folder, expected the settings file (TOML); move the folder away "
            f"and put the settings file back (an empty {SETTINGS_FILE} means all defaults)",
            option=str(path),
        ) from None
    except UnicodeDecodeError as exc:
        raise SettingsError(
            f"{path}: not UTF-8 text ({exc.reason} at byte {exc.start + 1}); save the file as "
            "UTF-8 or delete it for defaults",
            option=str(path),
        ) from None
    except OSError as exc:
        raise SettingsError(
            f"{path}: cannot read the settings file ({exc.strerror}); check its permissions",
            option=str(path),
        ) from None


def load_settings(
    project: str | os.PathLike[str], *, environ: Mapping[str, str] | None = None
) -> Settings:
    """Read the settings of the project folder ``project``.

    Parameters
    ----------
    project : path
        Project folder. A missing ``labeler.toml`` means all defaults.
    environ : mapping, optional
        Environment to read ``LABELER_*`` overrides from (default ``os.environ``).

    Returns
    -------
    Settings
        With :attr:`Settings.origins` telling where each value that is not a default
        came from.

    Raises
    ------
    SettingsError
        For an unreadable or malformed file, an unknown section or option, or a value of
        the wrong kind or out of range (:data:`RANGES`). The message starts with where the
        value came from (``<file> line N`` or ``environment variable LABELER_...``),
        names the option, what was expected and what was found, and ends with the fix.
    """
    root = Path(project)
    env = os.environ if environ is None else environ
    path = root / SETTINGS_FILE
    text = _read_text(path)
    raw: dict[str, object] = {}
    if text is not None:
        try:
            raw = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise SettingsError(
                f"{path}: not valid TOML ({exc}); fix the file or delete it for defaults",
                option=str(path),
            ) from None

    def file_origin(section: str, option: str | None) -> str:
        line = None if text is None else line_of(text, section, option)
        return f"{path} line {line}" if line else str(path)

    unknown = set(raw) - set(_SECTIONS) - {"classes"}
    if unknown:
        first = sorted(unknown)[0]
        raise SettingsError(
            f"{file_origin(first, None)}: unknown section(s) {', '.join(sorted(unknown))}; "
            f"known: {', '.join([*_SECTIONS, 'classes'])}; fix the name or delete the section",
            option=first,
        )
    sections: dict[str, object] = {}
    origins: dict[str, str] = {}
    try:
        for name in _SECTIONS:
            table = raw.get(name, {})
            if not isinstance(table, Mapping):
                raise SettingsError(f"[{name}]: expected a table, got {table!r}", option=name)
            sections[name] = _section_from(name, table, env, origins, file_origin)
        classes = DEFAULT_SCHEMA
        if "classes" in raw:
            origins["classes"] = file_origin("classes", None)
            classes = _classes_from(raw["classes"])
    except ValueError as exc:
        raise _with_origin(exc, env=env, file_origin=file_origin) from None
    return Settings(project=root, classes=classes, origins=origins, **sections)  # type: ignore[arg-type]


def _with_origin(exc: ValueError, *, env: Mapping[str, str], file_origin) -> SettingsError:
    """``exc`` as a SettingsError that starts with where the bad value came from."""
    message = str(exc)
    option = getattr(exc, "option", "")
    if not option:  # a section's own check that names its option "section.option: ..."
        m = re.match(r"\[?(\w+)(?:\.(\w+))?", message)
        option = m.group(0).lstrip("[") if m else ""
    section, _, name = option.partition(".")
    if "." in name:
        name = name.split(".")[0]
    env_name = f"LABELER_{section}_{name}".upper() if name else ""
    if env_name and env_name in env:
        return SettingsError(
            f"environment variable {env_name}: {message}; correct the variable or unset it "
            "(the settings file is not at fault)",
            option=option,
            origin=env_name,
        )
    origin = getattr(exc, "origin", "") or file_origin(section, name or None)
    fix = "correct the value, or delete the line to use the default"
    if section == "classes":
        fix = "correct the [classes] table, or delete it to use the default classes"
    return SettingsError(f"{origin}: {message}; {fix}", option=option, origin=origin)
