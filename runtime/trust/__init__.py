"""rigcast.runtime.trust: what the server lets a peer do.

Modules: security, keys, limits, ownership, reload, fairness.
"""
