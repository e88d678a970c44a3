"""rigcast.export.rigs: rig sources: the Rig contract, loaders for every kind of rig, the demo rigs.

Modules: rig, rig_loader, callable_rig, process_rig, dataset_rig, blender_rig, gltf_rig, gltf_io,
gltf_eval, zoo, zoo_mesh, demo_rigs, demo_face, demo_face_shapes, demo_mesh, demo_arm.
"""
