"""The implementations of encoding and ranking as they were before they were rewritten for
speed, kept only as references the property tests compare the current ones with."""
