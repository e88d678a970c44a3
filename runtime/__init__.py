"""rigcast.runtime: the live half. Loads a bundle and serves mesh frames -> controls.

This package depends on onnxruntime, numpy, pyzmq and msgpack only. It never imports torch
or ``rigcast.export`` (tests/test_import_guard.py proves it).
"""
