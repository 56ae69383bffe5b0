"""The host's decoder wing: the trained policy, its torch and ONNX interfaces, and loading by reference.

Stages use these directly; plugins keep what a lab swaps (robots, datasets, networks, losses, operators,
baselines, labellers).
"""
