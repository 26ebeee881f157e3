"""Replays: a recording re-run from a keyframe on the same batches, with the recorded or other optimizers."""
