"""rigcast.export.training: the models and their training.

Modules: models, train, train_common, train_forward, train_inverse, reduction, refine.
"""
