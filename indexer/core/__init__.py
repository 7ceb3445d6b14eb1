"""Core: the building blocks every stage shares and none owns.

Errors with their exit codes (errors), the store's settings with their checks and help (settings),
the one rule for the numbers a person gives: thresholds, precisions, k (limits), file-system care
such as atomic writes and fsync (fsutil), progress bars (progress), the thread pools that share a
batch among the cores (cores, split_batch), the statistics behind calibration: Wilson intervals and
the score-mixture fit (rates), and the points where a test can hold an index run to kill it
(pause). Nothing here imports from any other part of nearsight.
"""
