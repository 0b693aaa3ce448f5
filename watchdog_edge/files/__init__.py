"""Files on disk: config and card loading, card building from training rows, TOML writing."""
