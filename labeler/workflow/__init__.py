"""The loop: add -> propose -> pick -> annotate -> retrain -> export.

Each function takes an open :class:`labeler.project.Project`, calls the rooms that own
the work (store, imagery, masks, model, picker, agreement, export) and returns plain
results for the CLI or the terminal queue to show. Nothing here prints. One module per
stage:

========================  ===========================================================
``adding``                images into the project (``labeler add``)
``status``                tiles per state, image and annotator (``labeler status``)
``proposing``             proposals from the cold start or the newest head
``picking``               the queue order from the active-learning picker
``annotating``            saves, accepting, parking, the queue, the next tile
``editing``               the store behind the mask editor, learning on one tile
``effort``                actions, seconds and accepted share per model version
``agreeing``              agreement figures, report and contested tiles
``retraining``            a new head on every saved mask
``renewing``              new proposals for the open tiles after a retrain
``adapting``              the encoder adapted to the project's tiles without labels
``encoders``              encoder versions: ImageNet-1k and the adapted ones
``exporting``             GeoJSON, PNG masks, manifest
``importing``             masks made elsewhere, saved tile by tile like any save
``views``                 read-only views for the edges (preview, places, lists)
``naming``                short names of model versions, their details
``reviewing``             who may settle a contested tile
``features``              encoder features and their cache (proposing, retraining)
``progress``              the ``progress(done, total, label)`` callback type
========================  ===========================================================
"""

import importlib
from typing import Any

__all__ = [
    "VersionEffort",
    "effort_by_model",
    "Progress",
    "no_progress",
    "AddResult",
    "add_images",
    "capture_dates",
    "set_capture_date",
    "AdaptOutcome",
    "adapt",
    "encoder_versions",
    "ProjectStatus",
    "project_status",
    "QueueRow",
    "accept_tile",
    "after_save",
    "next_tile",
    "park_tile",
    "unpark_tile",
    "queue_rows",
    "save_state",
    "save_tile_mask",
    "weak_label_tile_state",
    "PickedTile",
    "PickResult",
    "pick_tiles",
    "agreement_summary",
    "compared_images",
    "contested_tiles",
    "write_agreement",
    "EditStart",
    "StoreBackend",
    "begin_edit",
    "end_edit",
    "release_tile",
    "ExportResult",
    "ImportResult",
    "export_project",
    "import_masks",
    "ProposeResult",
    "propose",
    "LabelledTile",
    "RetrainResult",
    "labelled_tiles",
    "retrain",
    "RenewResult",
    "renew_proposals",
    "background_work",
    "annotators",
    "model_versions",
    "TileView",
    "tile_view",
    "TilePlace",
    "tile_places",
    "SaveBasis",
    "save_basis",
]


#: The module of each public name; imported on first use (PEP 562), so a command
#: loads only the stages it runs (importing every stage took about a second).
_WHERE = {
    "AdaptOutcome": "adapting",
    "adapt": "adapting",
    "AddResult": "adding",
    "add_images": "adding",
    "capture_dates": "adding",
    "set_capture_date": "adding",
    "agreement_summary": "agreeing",
    "compared_images": "agreeing",
    "contested_tiles": "agreeing",
    "write_agreement": "agreeing",
    "QueueRow": "annotating",
    "accept_tile": "annotating",
    "after_save": "annotating",
    "next_tile": "annotating",
    "park_tile": "annotating",
    "queue_rows": "annotating",
    "save_state": "annotating",
    "save_tile_mask": "annotating",
    "unpark_tile": "annotating",
    "weak_label_tile_state": "annotating",
    "EditStart": "editing",
    "StoreBackend": "editing",
    "begin_edit": "editing",
    "end_edit": "editing",
    "release_tile": "editing",
    "VersionEffort": "effort",
    "effort_by_model": "effort",
    "encoder_versions": "encoders",
    "ExportResult": "exporting",
    "export_project": "exporting",
    "ImportResult": "importing",
    "import_masks": "importing",
    "PickResult": "picking",
    "PickedTile": "picking",
    "pick_tiles": "picking",
    "Progress": "progress",
    "no_progress": "progress",
    "ProposeResult": "proposing",
    "propose": "proposing",
    "RenewResult": "renewing",
    "background_work": "renewing",
    "renew_proposals": "renewing",
    "LabelledTile": "retraining",
    "RetrainResult": "retraining",
    "labelled_tiles": "retraining",
    "retrain": "retraining",
    "ProjectStatus": "status",
    "project_status": "status",
    "SaveBasis": "views",
    "TilePlace": "views",
    "TileView": "views",
    "annotators": "views",
    "model_versions": "views",
    "save_basis": "views",
    "tile_places": "views",
    "tile_view": "views",
}


def __getattr__(name: str) -> Any:
    module = _WHERE.get(name)
    if module is None:
        raise AttributeError(f"module 'labeler.workflow' has no attribute {name!r}")
    value = getattr(importlib.import_module(f"labeler.workflow.{module}"), name)
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_WHERE))
