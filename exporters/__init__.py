"""Training pipeline (PyTorch, optional `[train]` extra). Never imported at run time."""
