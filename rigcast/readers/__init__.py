"""rigcast.readers: takes in: mesh performances from files.

Modules: takes, gltf_take, take_common.
"""
