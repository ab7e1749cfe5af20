"""The generator's version string: it changes whenever any output byte for any request would."""

ALGORITHM = "seedbed-philox4x64-v1"
