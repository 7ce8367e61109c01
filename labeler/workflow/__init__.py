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

from labeler.workflow.adapting import AdaptOutcome, adapt
from labeler.workflow.adding import AddResult, add_images, capture_dates, set_capture_date
from labeler.workflow.agreeing import (
    agreement_summary,
    compared_images,
    contested_tiles,
    write_agreement,
)
from labeler.workflow.annotating import (
    QueueRow,
    accept_tile,
    after_save,
    next_tile,
    park_tile,
    queue_rows,
    save_state,
    save_tile_mask,
    unpark_tile,
    weak_label_tile_state,
)
from labeler.workflow.editing import (
    EditStart,
    StoreBackend,
    begin_edit,
    end_edit,
    release_tile,
)
from labeler.workflow.effort import VersionEffort, effort_by_model
from labeler.workflow.encoders import encoder_versions
from labeler.workflow.exporting import ExportResult, export_project
from labeler.workflow.importing import ImportResult, import_masks
from labeler.workflow.picking import PickedTile, PickResult, pick_tiles
from labeler.workflow.progress import Progress, no_progress
from labeler.workflow.proposing import ProposeResult, propose
from labeler.workflow.renewing import RenewResult, background_work, renew_proposals
from labeler.workflow.retraining import LabelledTile, RetrainResult, labelled_tiles, retrain
from labeler.workflow.status import ProjectStatus, project_status
from labeler.workflow.views import (
    SaveBasis,
    TilePlace,
    TileView,
    annotators,
    model_versions,
    save_basis,
    tile_places,
    tile_view,
)

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
