"""Calibration: thresholds that mean a stated precision on this collection.

Synthetic copies of the collection's own images measure what a score means here and give the
thresholds and the query verdict's threshold (calibrate, with its human-readable report in
calibration_report). People's verdicts on pairs are kept and fed back (verdicts), and the pairs most
worth a person's look are chosen (review_queue).
"""
