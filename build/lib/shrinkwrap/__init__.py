"""shrinkwrap: shrink a fine-tuned BERT-family text classifier for CPU serving, measuring every step."""

__version__ = "0.1.0"
