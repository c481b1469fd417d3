"""The signal chain's stages: upsample, modulate, output stage, reconstruct, chain driver."""
