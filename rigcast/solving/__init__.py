"""rigcast.solving: `rigcast solve`: one take, batches of takes, what a solve writes.

Modules: solve_take, take_batch, solve_out, forward_subset.
"""
