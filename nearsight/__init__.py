"""nearsight: find near-duplicate and similar images in large unlabeled collections.

Everything installs under this one name: `nearsight.indexer` (the domain), `nearsight.service` (the HTTP
layer) and `nearsight.demo_data` (the invented demo archive). The source folders `indexer/`, `service/`
and `demo_data/` are mapped to those names by pyproject.toml.
"""

from nearsight.indexer import __version__

__all__ = ["__version__"]
