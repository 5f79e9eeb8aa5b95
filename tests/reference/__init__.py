"""Cross-checks of actdoc against outside reference libraries (PyTorch, scikit-learn)."""
