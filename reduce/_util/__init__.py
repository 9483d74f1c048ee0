"""The few helpers several modules share (private to the package)."""
