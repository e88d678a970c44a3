"""rigcast.blender: Blender: the .blend rig's Blender side, write-back and live.

Modules: blender_scene, blender_demo, blender_out, blender_live.
"""
