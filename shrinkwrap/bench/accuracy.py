"""Transitional: the classification figures moved to shrinkwrap.metrics (train.py and bench both use
them); this name stays until package.py imports from there (remove after the merge)."""
from shrinkwrap.metrics import classification_metrics, confusion  # noqa: F401
