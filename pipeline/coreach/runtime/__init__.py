"""Torch-free runtime for the robot computer: bundle checks, kinematics and the safety-filtered control step.

Importing this package (or any module in it except `export`) loads only numpy, onnxruntime and the shared
array-API modules; `export` is the torch side that writes bundles and is never imported here.
"""
