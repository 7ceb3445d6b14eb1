"""Acting: what a person does with the groups, without losing a photo.

Which copy of a group to keep (keepers, keeplist, picks), the plan of moves with its evidence and
explanations (plan, evidence, explain), verified moves into quarantine and back, each recorded in a
manifest with content hashes (moves, quarantine, manifest, restore), and the groups report (report).
Everything that touches a user's files is a dry run unless asked otherwise.
"""
