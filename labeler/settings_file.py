"""The commented settings file that ``labeler init`` writes into a new project.

Every option with its default and a word on what it does; the options themselves, their
checks and their documentation are in :mod:`labeler.settings`, whose tests check that
this text loads to the defaults.
"""

from __future__ import annotations

__all__ = ["default_settings_text"]


def default_settings_text() -> str:
    """The commented settings file that ``labeler init`` writes."""
    return """\
# labeler project settings. Every option is optional; these are the defaults.
# An environment variable LABELER_<SECTION>_<OPTION> overrides a value here.

[store]
# url = "postgresql+psycopg://user@server/labeler"   # default: labeler.db in this folder
# image_root = "/mnt/farm-images"   # the team's shared image folder, as this machine mounts it

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
batch_size = 4
min_labelled_tiles = 3
val_share = 0.2
augment = "auto"          # "auto", "turns" (exact, cached), "images" (slow) or "features"
patience = 10             # early stopping only; retrain keeps the state at the budget's end
finetune_stages = 0       # encoder stages trained with the head: 0, 2 or 4
precision = "auto"        # propose in bfloat16 where the CPU has it; "float32" turns it off
train_precision = "auto"  # "auto" (bfloat16 where the CPU has it), "float32" or "bfloat16"

[picker]
strategy = "mixed"        # random, entropy, margin, bald, coreset, mixed
k = 20
seed = 0

[agreement]
overlap_share = 0.1
annotators_per_tile = 2
metric = "kappa"          # "kappa" or "iou"
threshold = 0.6
reviewers = ""            # who settles contested tiles, e.g. "ana, tomas"; "" = anyone else

[export]
simplify_tolerance_px = 0.5
min_area_px = 8
val_share = 0.2
seed = 0
block_tiles = 4           # side of a train/val block, in tiles

[editor]
autosave_seconds = 5
opacity = 0.45

[preview]
graphics = "auto"         # "kitty", "sixel", "off" (half blocks) or "auto" (from TERM)

[holds]
lease_minutes = 30        # a hold lapses after this long without a sign from its editor
heartbeat_seconds = 60    # how often an open editor renews its hold

[cluster]
# address = "tcp://scheduler.example:8786"   # default: work on this machine
connect_timeout = 10      # seconds to wait for the scheduler
worker_threads = 0        # torch threads per task on a worker (0: cores / task threads)
# worker_cache = "/var/tmp/labeler-features"  # default: the worker's temporary folder

# [classes]               # replaces the default schema when present
# soil = { index = 0 }
# crop = { index = 1, colour = "#0072B2" }
# weed = { index = 2, colour = "#E69F00" }
# symptom = { index = 3, colour = "#CC79A7" }
"""
