"""rigcast.export.data: sampling the rig and the datasets it fills.

Modules: sampling, dataset, executor.
"""
