"""nearsight test suite."""
