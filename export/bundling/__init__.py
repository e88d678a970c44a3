"""rigcast.export.bundling: building a bundle: config, build, ONNX export, writing and checking.

Modules: build_config, build, build_finish, build_check, take_fit, onnx_export, synthetic_bundle.
"""
