"""Reading: from folders of files to catalogued contents.

Decoding any image kind once, at reduced scale where the format allows, into a small copy
(images), recording every file that cannot be read and why (read_errors), and the incremental scan
that hashes, decodes and catalogues a folder with worker processes, noticing moves, changes and
removals (scan). This is the first stage of the data flow.
"""
