"""evalkit: compare prompting styles and model sizes on reasoning tasks, with audited chains and honest statistics."""

__version__ = "0.1.0"
