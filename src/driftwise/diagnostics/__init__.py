"""Layer 4, what the fit says: divergence/vorticity posteriors and the Helmholtz split, gridded products,
kernel-family evidence with the verdict, and forecast skill against held-out tracks.

May import: the ground floor, ``driftwise.data``, ``gp``, ``dynamics`` and this package.
"""
