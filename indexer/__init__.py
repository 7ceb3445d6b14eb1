"""nearsight's domain: everything that turns folders of images into a searchable store.

The sub-packages are the stages of the data flow, in order; a module imports from its own stage and
earlier ones only (tests/test_layout.py checks it from the import statements):

    core         errors, settings, limits, file-system care, progress, thread pools, statistics
    storage      the store folder and its SQLite catalog
    reading      decoding images into small copies; the incremental scan
    learning     the encoder, its views and losses, training, the model files, running the model
    matching     embedding, the FAISS index, whitening, queries, verification, groups
    calibration  thresholds for a stated precision; people's verdicts; the review queue
    building     making a generation, full or incremental, and the index run that publishes it
    acting       keepers, the quarantine plan, verified moves, restore, the groups report

The modules left at this level (cli, commands, demo, check, integrity, backup) are the command
layer: they may use every stage, and no stage uses them.
"""

__version__ = "0.1.0"

STAGES = ("core", "storage", "reading", "learning", "matching", "calibration", "building", "acting")
