"""Building: making and publishing a generation.

A full build (build), an incremental one that re-uses the previous generation where nothing changed
(refresh), writing a generation whole and switching the pointer to it (publish), groups that respect
people's verdicts (verdict_groups), and the index run that takes a store from scanned folders to a
published generation: scan, train or keep the model, embed, index, group, calibrate, publish
(pipeline).
"""
