"""What comes out of a collection: trace, status summaries, the datasheet and Croissant."""
