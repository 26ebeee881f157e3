"""The Recorder, its hooks and what they capture each step; nbkit.record attaches one."""
