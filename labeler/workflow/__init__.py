"""The loop: add -> propose -> pick -> annotate -> retrain -> export.

Each function takes an open :class:`labeler.project.Project`, calls the rooms that own
the work (store, imagery, masks, model, picker, agreement, export) and returns plain
results for the CLI or the terminal queue to show. Nothing here prints.
"""

from labeler.workflow.adding import AddResult, Progress, ProjectStatus, add_images, project_status
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
)
from labeler.workflow.editing import EditStart, StoreBackend, begin_edit, end_edit
from labeler.workflow.exporting import ExportResult, ImportResult, export_project, import_masks
from labeler.workflow.picking import RankResult, rank_tiles
from labeler.workflow.proposing import (
    ProposeResult,
    RetrainResult,
    labelled_tiles,
    propose,
    retrain,
)

__all__ = [
    "Progress",
    "AddResult",
    "add_images",
    "ProjectStatus",
    "project_status",
    "QueueRow",
    "accept_tile",
    "after_save",
    "next_tile",
    "park_tile",
    "queue_rows",
    "save_state",
    "save_tile_mask",
    "RankResult",
    "rank_tiles",
    "agreement_summary",
    "compared_images",
    "contested_tiles",
    "write_agreement",
    "EditStart",
    "StoreBackend",
    "begin_edit",
    "end_edit",
    "ExportResult",
    "ImportResult",
    "export_project",
    "import_masks",
    "ProposeResult",
    "RetrainResult",
    "labelled_tiles",
    "propose",
    "retrain",
]
