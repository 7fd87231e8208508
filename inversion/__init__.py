"""planetmix engine."""
