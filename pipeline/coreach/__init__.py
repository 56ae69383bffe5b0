"""coreach: train, vet and release latent-action decoders for assistive robot arms."""

__version__ = "0.1.0"
