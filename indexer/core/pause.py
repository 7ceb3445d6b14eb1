"""Tests only: hold the `index` run at a named stage so that a test can SIGKILL it there.

``NEARSIGHT_TEST_PAUSE_AT=<stage>`` makes the run sleep the first time it reaches that
point (stages: ``scan`` after a chunk of files is committed, ``embed`` after a block of
vectors is committed, ``index`` after the index is built or updated in memory,
``publish`` once the new generation's temporary folder is complete, ``pointer`` after
that folder is renamed into place but before ``generations/CURRENT`` names it). Unset,
every call is a dictionary look-up and nothing else.
"""

from __future__ import annotations

import logging
import os
import time

log = logging.getLogger(__name__)

TEST_PAUSE_ENV = "NEARSIGHT_TEST_PAUSE_AT"
STAGES = ("scan", "embed", "index", "publish", "pointer")


def pause_at(stage: str) -> None:
    """Sleep (until killed) when the test hook names `stage`."""
    if os.environ.get(TEST_PAUSE_ENV) == stage:
        log.warning("%s: pausing at stage %s (pid %d)", TEST_PAUSE_ENV, stage, os.getpid())
        time.sleep(3600)
