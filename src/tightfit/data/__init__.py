"""Data sources (built-in synthetic parts, image folders, Fashion-MNIST) and deterministic splits."""
