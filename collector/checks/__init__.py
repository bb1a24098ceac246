"""What a file is and whether it may be kept: image checks and facts, perceptual hashes,
licences."""
