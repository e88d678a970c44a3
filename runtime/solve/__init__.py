"""rigcast.runtime.solve: the solve core and the per-frame math, live (a batch of one frame) and in
batch.

Modules: stages, solve_core, pipeline, batch, inference, refine, align, one_euro, manifold,
head_pose.
"""
