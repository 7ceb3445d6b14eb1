"""nearsight's HTTP layer: a thin Flask application over indexer's public functions."""
