"""rigcast.writers: solves out: animation files and what each frame carries.

Modules: controls_out, animation_out, gltf_out, usd_out, skeleton, frame_info.
"""
