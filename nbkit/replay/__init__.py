"""Keyframe restore, batch fingerprints, replays."""
