"""Project settings: ``<project>/labeler.toml`` plus ``LABELER_*`` environment, read once.

Every option has a default, so an empty settings file is a valid project. The file is
TOML with one table per section; an environment variable
``LABELER_<SECTION>_<OPTION>`` (upper case) overrides the file, e.g.
``LABELER_STORE_URL=postgresql+psycopg://...`` or ``LABELER_MODEL_MC_SAMPLES=4``.

Sections and options (defaults in brackets):

``[store]``
    ``url`` [``sqlite:///<project>/labeler.db``] database URL (SQLAlchemy form).
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
    upper bound, early stopping decides; ``batch_size`` [8]; ``min_labelled_tiles`` [3]
    fewest labelled tiles ``retrain`` accepts; ``val_share`` [0.2] held-out slice for early
    stopping; ``threads`` [0] torch threads (0 = all cores); ``augment`` ["auto"] how
    ``retrain`` augments: ``"images"`` flips, turns and colour-jitters the tiles and passes
    them through the encoder every epoch (better with few labels, slower),
    ``"features"`` turns the cached features (fast), ``"auto"`` images for up to 24
    labelled tiles, else features; ``patience`` [10] epochs without a lower validation
    loss before training stops (a few labelled tiles give a noisy validation loss).
``[picker]``
    ``strategy`` ["mixed"] one of random, entropy, margin, bald, coreset, mixed;
    ``k`` [20] tiles per batch; ``seed`` [0].
``[agreement]``
    ``overlap_share`` [0.1] share of tiles given to several annotators;
    ``annotators_per_tile`` [2]; ``metric`` ["kappa"] ``"kappa"`` or ``"iou"``;
    ``threshold`` [0.6] tiles agreeing less become ``contested``.
``[export]``
    ``simplify_tolerance_px`` [0.5]; ``min_area_px`` [8]; ``val_share`` [0.2]; ``seed`` [0].
``[editor]``
    ``autosave_seconds`` [5]; ``opacity`` [0.45].
``[holds]``
    ``lease_minutes`` [30] a hold lapses after this long without a heartbeat from its
    editor (by the database's clock); ``heartbeat_seconds`` [60] how often an open
    editor renews its hold.
``[classes]``
    optional table ``name = {index = i, colour = "#RRGGBB"}`` replacing the default schema
    of :mod:`labeler.classes`.

Retired options (:data:`RETIRED_OPTIONS`) that settings files of older projects still
carry are read and ignored, so those projects keep opening.
"""

from __future__ import annotations

import dataclasses
import os
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

from labeler.classes import DEFAULT_SCHEMA, ClassSchema

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
    "Settings",
    "STRATEGIES",
    "AUGMENT_MODES",
    "RETIRED_OPTIONS",
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
AUGMENT_MODES = ("auto", "features", "images")


@dataclass(frozen=True)
class StoreSettings:
    url: str = ""


@dataclass(frozen=True)
class TileSettings:
    size: int = 256
    overlap: int = 32
    max_image_px: int = 2_500_000_000

    def __post_init__(self) -> None:
        if self.max_image_px < 1:
            raise ValueError(
                f"tiles.max_image_px: expected at least 1 pixel, got {self.max_image_px}"
            )
        if self.size < 16:
            raise ValueError(f"tiles.size: expected at least 16 pixels, got {self.size}")
        if not 0 <= self.overlap < self.size:
            raise ValueError(
                f"tiles.overlap: expected 0 <= overlap < size ({self.size}), got {self.overlap}"
            )


@dataclass(frozen=True)
class ColdStartSettings:
    exr_coefficient: float = 1.4
    threshold: str = "zero"
    min_object_px: int = 24

    def __post_init__(self) -> None:
        if self.threshold not in ("zero", "otsu"):
            raise ValueError(
                f"cold_start.threshold: expected 'zero' or 'otsu', got {self.threshold!r}"
            )


@dataclass(frozen=True)
class ModelSettings:
    mc_samples: int = 8
    seed: int = 0
    epochs: int = 40
    batch_size: int = 8
    min_labelled_tiles: int = 3
    val_share: float = 0.2
    threads: int = 0
    augment: str = "auto"
    patience: int = 10

    def __post_init__(self) -> None:
        if self.patience < 1:
            raise ValueError(f"model.patience: expected at least 1 epoch, got {self.patience}")
        if self.augment not in AUGMENT_MODES:
            raise ValueError(
                f"model.augment: expected one of {', '.join(AUGMENT_MODES)}, got {self.augment!r}"
            )
        if self.mc_samples < 1:
            raise ValueError(f"model.mc_samples: expected at least 1, got {self.mc_samples}")
        if not 0.0 <= self.val_share < 1.0:
            raise ValueError(f"model.val_share: expected 0 <= share < 1, got {self.val_share}")


@dataclass(frozen=True)
class PickerSettings:
    strategy: str = "mixed"
    k: int = 20
    seed: int = 0

    def __post_init__(self) -> None:
        if self.strategy not in STRATEGIES:
            raise ValueError(
                f"picker.strategy: expected one of {', '.join(STRATEGIES)}, got {self.strategy!r}"
            )
        if self.k < 1:
            raise ValueError(f"picker.k: expected at least 1, got {self.k}")


@dataclass(frozen=True)
class AgreementSettings:
    overlap_share: float = 0.1
    annotators_per_tile: int = 2
    metric: str = "kappa"
    threshold: float = 0.6

    def __post_init__(self) -> None:
        if not 0.0 <= self.overlap_share <= 1.0:
            raise ValueError(
                f"agreement.overlap_share: expected a share in 0..1, got {self.overlap_share}"
            )
        if self.annotators_per_tile < 2:
            raise ValueError(
                "agreement.annotators_per_tile: expected at least 2 (agreement needs two), "
                f"got {self.annotators_per_tile}"
            )
        if self.metric not in ("kappa", "iou"):
            raise ValueError(f"agreement.metric: expected 'kappa' or 'iou', got {self.metric!r}")


@dataclass(frozen=True)
class ExportSettings:
    simplify_tolerance_px: float = 0.5
    min_area_px: float = 8.0
    val_share: float = 0.2
    seed: int = 0


@dataclass(frozen=True)
class HoldSettings:
    lease_minutes: float = 30.0
    heartbeat_seconds: float = 60.0

    def __post_init__(self) -> None:
        if not self.lease_minutes > 0:
            raise ValueError(
                f"holds.lease_minutes: expected a positive number of minutes, got {self.lease_minutes}"
            )
        if not 0 < self.heartbeat_seconds < self.lease_minutes * 60:
            raise ValueError(
                "holds.heartbeat_seconds: expected a positive number of seconds below the "
                f"lease ({self.lease_minutes * 60:g} s), got {self.heartbeat_seconds}"
            )


@dataclass(frozen=True)
class EditorSettings:
    autosave_seconds: float = 5.0
    opacity: float = 0.45


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
    "holds": HoldSettings,
}


@dataclass(frozen=True)
class Settings:
    """All settings of one project (immutable once read)."""

    project: Path = Path(".")
    store: StoreSettings = field(default_factory=StoreSettings)
    tiles: TileSettings = field(default_factory=TileSettings)
    cold_start: ColdStartSettings = field(default_factory=ColdStartSettings)
    model: ModelSettings = field(default_factory=ModelSettings)
    picker: PickerSettings = field(default_factory=PickerSettings)
    agreement: AgreementSettings = field(default_factory=AgreementSettings)
    export: ExportSettings = field(default_factory=ExportSettings)
    editor: EditorSettings = field(default_factory=EditorSettings)
    holds: HoldSettings = field(default_factory=HoldSettings)
    classes: ClassSchema = DEFAULT_SCHEMA

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


def _coerce(section: str, option: str, value: object, target: type) -> object:
    where = f"{section}.{option}"
    if target is int:
        if isinstance(value, bool):
            raise ValueError(f"{where}: expected an integer, got {value!r}")
        try:
            number = float(value)  # type: ignore[arg-type]
        except (TypeError, ValueError):
            raise ValueError(f"{where}: expected an integer, got {value!r}") from None
        if number != int(number):
            raise ValueError(f"{where}: expected an integer, got {value!r}")
        return int(number)
    if target is float:
        try:
            return float(value)  # type: ignore[arg-type]
        except (TypeError, ValueError):
            raise ValueError(f"{where}: expected a number, got {value!r}") from None
    return str(value)


def _section_from(name: str, raw: Mapping[str, object], env: Mapping[str, str]) -> object:
    cls = _SECTIONS[name]
    kinds = {f.name: f.type for f in dataclasses.fields(cls)}
    pytype = {"int": int, "float": float, "str": str}
    unknown = set(raw) - set(kinds) - set(RETIRED_OPTIONS.get(name, ()))
    if unknown:
        raise ValueError(
            f"[{name}]: unknown option(s) {', '.join(sorted(unknown))}; known: {', '.join(kinds)}"
        )
    values: dict[str, object] = {}
    for option, kind in kinds.items():
        target = pytype[kind if isinstance(kind, str) else kind.__name__]
        if option in raw:
            values[option] = _coerce(name, option, raw[option], target)
        env_name = f"LABELER_{name}_{option}".upper()
        if env_name in env:
            values[option] = _coerce(name, option, env[env_name], target)
    return cls(**values)


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

    Raises
    ------
    ValueError
        For a malformed file, an unknown section or option, or a value of the wrong kind;
        the message names the file and the option.
    """
    root = Path(project)
    env = os.environ if environ is None else environ
    path = root / SETTINGS_FILE
    raw: dict[str, object] = {}
    if path.exists():
        try:
            raw = tomllib.loads(path.read_text(encoding="utf-8"))
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
            raise ValueError(
                f"{path}: not valid TOML ({exc}); fix the file or delete it for defaults"
            ) from None
    unknown = set(raw) - set(_SECTIONS) - {"classes"}
    if unknown:
        raise ValueError(
            f"{path}: unknown section(s) {', '.join(sorted(unknown))}; "
            f"known: {', '.join([*_SECTIONS, 'classes'])}"
        )
    sections: dict[str, object] = {}
    try:
        for name in _SECTIONS:
            table = raw.get(name, {})
            if not isinstance(table, Mapping):
                raise ValueError(f"[{name}]: expected a table, got {table!r}")
            sections[name] = _section_from(name, table, env)
        classes = DEFAULT_SCHEMA
        if "classes" in raw:
            classes = ClassSchema.from_mapping(raw["classes"])  # type: ignore[arg-type]
    except ValueError as exc:
        raise ValueError(f"{path}: {exc}") from None
    return Settings(project=root, classes=classes, **sections)  # type: ignore[arg-type]


def default_settings_text() -> str:
    """The commented settings file that ``labeler init`` writes."""
    return """\
# labeler project settings. Every option is optional; these are the defaults.
# An environment variable LABELER_<SECTION>_<OPTION> overrides a value here.

[store]
# url = "postgresql+psycopg://user@server/labeler"   # default: labeler.db in this folder

[tiles]
size = 256
overlap = 32
max_image_px = 2_500_000_000   # largest image add accepts (width x height)

[cold_start]
exr_coefficient = 1.4     # Meyer & Neto 2008; 1.3 is the older form
threshold = "zero"        # "zero" (ExG - ExR > 0) or "otsu"
min_object_px = 24

[model]
mc_samples = 8
seed = 0
epochs = 40
batch_size = 8
min_labelled_tiles = 3
val_share = 0.2
augment = "auto"          # "auto", "images" (few labels, slower) or "features" (fast)
patience = 10             # epochs without a lower validation loss before stopping

[picker]
strategy = "mixed"        # random, entropy, margin, bald, coreset, mixed
k = 20
seed = 0

[agreement]
overlap_share = 0.1
annotators_per_tile = 2
metric = "kappa"          # "kappa" or "iou"
threshold = 0.6

[export]
simplify_tolerance_px = 0.5
min_area_px = 8
val_share = 0.2
seed = 0

[editor]
autosave_seconds = 5
opacity = 0.45

[holds]
lease_minutes = 30        # a hold lapses after this long without a sign from its editor
heartbeat_seconds = 60    # how often an open editor renews its hold

# [classes]               # replaces the default schema when present
# soil = { index = 0 }
# crop = { index = 1, colour = "#0072B2" }
# weed = { index = 2, colour = "#E69F00" }
# symptom = { index = 3, colour = "#CC79A7" }
"""
