"""Label schema and overlay palette (docs/architecture.md, "Label schema").

Class indices are stored in ``uint8`` masks. Index 0 is the background (soil) and has
no overlay colour; index 255 (:data:`UNLABELLED`) marks pixels that a weak label leaves
open; losses and metrics ignore it.

The default palette follows Okabe & Ito (2008), "Color Universal Design", whose
colours stay distinguishable for the common forms of colour-vision deficiency.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass

import numpy as np

__all__ = [
    "UNLABELLED",
    "LabelClass",
    "ClassSchema",
    "DEFAULT_SCHEMA",
    "hex_to_rgb",
]

#: Mask value of a pixel that carries no label (weak labels only).
UNLABELLED = 255


def hex_to_rgb(colour: str) -> tuple[int, int, int]:
    """Parse ``"#RRGGBB"`` into an ``(r, g, b)`` tuple of ints in 0..255.

    Raises
    ------
    ValueError
        If ``colour`` is not of the form ``#RRGGBB``.
    """
    text = colour.strip()
    if len(text) != 7 or text[0] != "#":
        raise ValueError(f"colour: expected '#RRGGBB', got {colour!r}; write e.g. '#0072B2'")
    try:
        return tuple(int(text[i : i + 2], 16) for i in (1, 3, 5))  # type: ignore[return-value]
    except ValueError:
        raise ValueError(
            f"colour: expected hexadecimal digits in '#RRGGBB', got {colour!r}"
        ) from None


@dataclass(frozen=True)
class LabelClass:
    """One class of the schema.

    Parameters
    ----------
    index : int
        Value stored in masks, 0..254.
    name : str
        Short lower-case name used in files and on screen (``"weed"``).
    colour : str or None
        Overlay colour ``"#RRGGBB"``; ``None`` draws no overlay (background).
    """

    index: int
    name: str
    colour: str | None

    @property
    def rgb(self) -> tuple[int, int, int] | None:
        """Overlay colour as ``(r, g, b)`` or ``None``."""
        return None if self.colour is None else hex_to_rgb(self.colour)


class ClassSchema:
    """An ordered set of label classes.

    Parameters
    ----------
    classes : iterable of LabelClass
        Indices must be unique, in 0..254, and include 0 (the background).
    """

    def __init__(self, classes: Iterable[LabelClass]) -> None:
        items = sorted(classes, key=lambda c: c.index)
        if not items:
            raise ValueError("classes: expected at least one class, got none")
        seen_names: set[str] = set()
        seen_idx: set[int] = set()
        for c in items:
            if not 0 <= c.index <= 254:
                raise ValueError(
                    f"classes: index of {c.name!r} must be in 0..254 (255 means unlabelled), "
                    f"got {c.index}"
                )
            if c.index in seen_idx:
                raise ValueError(f"classes: index {c.index} is used twice; give each class its own")
            if c.name in seen_names:
                raise ValueError(f"classes: name {c.name!r} is used twice; names must be unique")
            if c.colour is not None:
                hex_to_rgb(c.colour)
            seen_idx.add(c.index)
            seen_names.add(c.name)
        if 0 not in seen_idx:
            raise ValueError("classes: index 0 (the background) is missing; add e.g. 'soil'")
        self._classes = tuple(items)

    # -- construction -----------------------------------------------------------------
    @classmethod
    def from_mapping(cls, table: Mapping[str, Mapping[str, object]]) -> ClassSchema:
        """Build from a settings table ``{name: {"index": i, "colour": "#RRGGBB"}}``."""
        out = []
        for name, spec in table.items():
            if "index" not in spec:
                raise ValueError(f"classes.{name}: expected an 'index' entry, got {dict(spec)!r}")
            colour = spec.get("colour")
            out.append(
                LabelClass(int(spec["index"]), str(name), None if colour is None else str(colour))
            )
        return cls(out)

    # -- queries ----------------------------------------------------------------------
    @property
    def classes(self) -> tuple[LabelClass, ...]:
        """Classes in index order."""
        return self._classes

    @property
    def indices(self) -> tuple[int, ...]:
        """Class indices in order."""
        return tuple(c.index for c in self._classes)

    @property
    def names(self) -> tuple[str, ...]:
        """Class names in index order."""
        return tuple(c.name for c in self._classes)

    @property
    def n_values(self) -> int:
        """One more than the largest index: the length of a per-index lookup table."""
        return self._classes[-1].index + 1

    def __len__(self) -> int:
        return len(self._classes)

    def __iter__(self):
        return iter(self._classes)

    def __eq__(self, other: object) -> bool:
        return isinstance(other, ClassSchema) and self._classes == other._classes

    def __hash__(self) -> int:
        return hash(self._classes)

    def __repr__(self) -> str:
        return f"ClassSchema({', '.join(f'{c.index}:{c.name}' for c in self._classes)})"

    def by_name(self, name: str) -> LabelClass:
        """The class called ``name``.

        Raises
        ------
        KeyError
            Naming the known classes.
        """
        for c in self._classes:
            if c.name == name:
                return c
        raise KeyError(
            f"class {name!r} is not in the schema; known classes: {', '.join(self.names)}"
        )

    def by_index(self, index: int) -> LabelClass:
        """The class with mask value ``index``."""
        for c in self._classes:
            if c.index == index:
                return c
        raise KeyError(f"class index {index} is not in the schema; known indices: {self.indices}")

    def lut_rgb(self) -> tuple[np.ndarray, np.ndarray]:
        """Overlay lookup tables indexed by mask value.

        Returns
        -------
        colours : ndarray, shape (256, 3), uint8
            RGB colour per mask value (0 where no overlay).
        has_overlay : ndarray, shape (256,), bool
            True where the value has an overlay colour.
        """
        colours = np.zeros((256, 3), np.uint8)
        has = np.zeros(256, bool)
        for c in self._classes:
            if c.rgb is not None:
                colours[c.index] = c.rgb
                has[c.index] = True
        return colours, has

    def check_mask(
        self, mask: np.ndarray, *, name: str = "mask", allow_unlabelled: bool = True
    ) -> None:
        """Raise ``ValueError`` unless ``mask`` is a 2-D uint8 array of known values."""
        if mask.ndim != 2 or mask.dtype != np.uint8:
            raise ValueError(
                f"{name}: expected a 2-D uint8 class-index array, got shape {mask.shape} "
                f"dtype {mask.dtype}"
            )
        allowed = np.zeros(256, bool)
        allowed[list(self.indices)] = True
        if allow_unlabelled:
            allowed[UNLABELLED] = True
        present = np.flatnonzero(np.bincount(mask.ravel(), minlength=256))
        bad = [int(v) for v in present if not allowed[v]]
        if bad:
            raise ValueError(
                f"{name}: holds values {bad} that are not class indices {self.indices}"
                + (" or 255 (unlabelled)" if allow_unlabelled else "")
                + "; map them to the schema first"
            )


#: The default schema (docs/architecture.md; Okabe & Ito 2008 colours).
DEFAULT_SCHEMA = ClassSchema(
    [
        LabelClass(0, "soil", None),
        LabelClass(1, "crop", "#0072B2"),
        LabelClass(2, "weed", "#E69F00"),
        LabelClass(3, "symptom", "#CC79A7"),
    ]
)
