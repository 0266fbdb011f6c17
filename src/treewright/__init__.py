"""treewright: unsupervised grammar induction on CPU PyTorch."""
