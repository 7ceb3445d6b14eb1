"""nearsight: find near-duplicate and similar images in large unlabeled collections.

Everything installs under this one name: `nearsight.indexer` (the domain), `nearsight.service` (the HTTP
layer) and `nearsight.demo_data` (the invented demo archive). The source folders `indexer/`, `service/`
and `demo_data/` are mapped to those names by pyproject.toml.

The Python API (nearsight/api.py):

    import nearsight

    with nearsight.open_store("archive-store", create=True) as store:
        store.index(["photos/"])
        answers = store.similar(["new/holiday.jpg"], k=5)
"""

from nearsight.indexer import __version__
from nearsight.api import Answer, Archive, IndexRun, Match, Status, open_store
from nearsight.indexer.core.errors import NearsightError, NotFoundError, StoreError, UsageError

__all__ = ["Answer", "Archive", "IndexRun", "Match", "NearsightError", "NotFoundError", "Status", "StoreError",
           "UsageError", "__version__", "open_store"]
