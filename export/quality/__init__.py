"""rigcast.export.quality: quality references and figures.

Modules: baselines, fidelity, metrics, take_synth.
"""
