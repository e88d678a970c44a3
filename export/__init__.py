"""rigcast.export: the offline half. Rig -> sampled dataset -> models -> ONNX bundle.

Importing this package is cheap; only the model, training and ONNX modules import torch.
"""
