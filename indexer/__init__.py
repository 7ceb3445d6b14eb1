"""nearsight's domain: everything that turns folders of images into a searchable store."""

__version__ = "0.1.0"
