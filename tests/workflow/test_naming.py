"""Short names of model versions (labeler/workflow/naming.py)."""

from labeler.workflow.naming import model_details, model_label, model_labels
from labeler.workflow.views import model_versions


def test_rules_get_a_short_numbered_name_heads_keep_theirs(project):
    store = project.store
    a = store.add_model_version(kind="cold_start", name="cold-start exg-exr 1.4 zero min24",
                                details={"exr_coefficient": 1.4, "threshold": "zero",
                                         "min_object_px": 24})
    h = store.add_model_version(kind="head", name="head-1", n_train_tiles=12)
    b = store.add_model_version(kind="cold_start", name="cold-start exg-exr 1 otsu min8")
    versions = model_versions(project)
    assert model_labels(versions) == {a.id: "colour rule", h.id: "head-1", b.id: "colour rule 2"}
    assert model_label(versions[2], versions) == "colour rule 2"
    assert model_details(versions[0]) == (
        "vegetation colour index ExG - ExR (ExR weight 1.4), threshold zero, objects from "
        "24 px; no training"
    )
    assert model_details(versions[2]) == "vegetation colour index ExG - ExR; no training"
    assert model_details(versions[1]) == "trained on 12 tiles"
