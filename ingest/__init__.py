"""Sources, the consumer loop, offsets, dead letters, the tape, and the demo-city generator."""
