"""The Store facade: its parts, the package's names, and the documentation of its methods."""

import inspect

import pytest

import labeler.store
from labeler.store import Store
from labeler.store.annotations import AnnotationsMixin
from labeler.store.base import StoreBase
from labeler.store.drafts import DraftsMixin
from labeler.store.events import EventsMixin
from labeler.store.history import HistoryMixin
from labeler.store.holds import HoldsMixin
from labeler.store.images import ImagesMixin
from labeler.store.models import ModelsMixin
from labeler.store.proposals import ProposalsMixin
from labeler.store.team import TeamMixin

PUBLIC = sorted(
    name for name, _ in inspect.getmembers(Store, inspect.isfunction) if not name.startswith("_")
)


def test_facade_is_made_of_one_part_per_concept():
    parts = (
        StoreBase,
        ImagesMixin,
        HoldsMixin,
        AnnotationsMixin,
        HistoryMixin,
        DraftsMixin,
        ModelsMixin,
        ProposalsMixin,
        EventsMixin,
        TeamMixin,
    )
    assert all(issubclass(Store, p) for p in parts)
    # each public method is defined in exactly one part
    owners = {n: [p for p in parts if n in vars(p)] for n in PUBLIC}
    assert {n: len(o) for n, o in owners.items()} == dict.fromkeys(PUBLIC, 1)


def test_package_names():
    assert set(labeler.store.__all__) <= set(vars(labeler.store))
    assert {"Store", "NewImage", "NewAnnotation", "NewProposal"} <= set(labeler.store.__all__)
    # the facade module keeps its names for callers that import it directly
    from labeler.store import store as facade

    assert facade.Store is Store
    assert facade.NewImage is labeler.store.NewImage
    assert facade.NewAnnotation is labeler.store.NewAnnotation
    assert facade.NewProposal is labeler.store.NewProposal


@pytest.mark.parametrize("name", PUBLIC)
def test_public_method_documents_parameters_and_returns(name):
    fn = getattr(Store, name)
    doc = inspect.getdoc(fn) or ""
    params = [p for p in inspect.signature(fn).parameters if p != "self"]
    assert "Returns\n-------" in doc, f"Store.{name}: no numpydoc Returns section"
    if params:
        assert "Parameters\n----------" in doc, f"Store.{name}: no numpydoc Parameters section"
        section = doc.split("Parameters\n----------", 1)[1].split("Returns\n-------", 1)[0]
        for p in params:
            assert p in section, f"Store.{name}: parameter {p!r} is not documented"
