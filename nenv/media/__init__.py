"""Audio files in and out: reading, validating, resampling, and outputs that are complete or absent."""
