"""Replay of recorded fixes: readers, state rebuild, training sets, pictures."""
