"""Layer 1, tracks in: reading files, column detection, quality control, the local metric frame,
velocity observations, forecast windows and the analytic flows used for tests.

May import: the ground floor (``driftwise.errors``, ``units``, ``files``, ``version``) and this package.
"""
