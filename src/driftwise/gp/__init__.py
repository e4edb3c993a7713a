"""Layer 2, the Gaussian-process field: matrix kernels and their family registry, the sparse variational
posterior (``FlowField``), the exact-q algebra, training and model files.

May import: the ground floor, ``driftwise.data`` and this package.
"""
