"""Layer 6, the edges: the command line, the demo job, its invented bay and scenarios.  No numerics here.

May import: every layer below and this package.
"""
