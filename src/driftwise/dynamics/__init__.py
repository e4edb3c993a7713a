"""Layer 3, particles in the field: the Itô SDE, Gaussian moment propagation, the Euler–Maruyama ensemble,
the method registry, K/τ calibration and releases with their spread products.

May import: the ground floor, ``driftwise.data``, ``driftwise.gp`` and this package.
"""
